package fhirmap

import "fmt"

// The CodeSystem is written with local types rather than the samply models:
// samply's CodeSystemConceptProperty has every value[x] field without
// omitempty, so it would emit valueCode, valueCoding, valueString, ... all at
// once, which is invalid FHIR (a choice element takes exactly one type).
type codeSystemJSON struct {
	ResourceType  string               `json:"resourceType"`
	ID            string               `json:"id"`
	Meta          *codeSystemMeta      `json:"meta,omitempty"`
	Text          *narrativeJSON       `json:"text,omitempty"`
	URL           string               `json:"url"`
	Version       string               `json:"version"`
	Name          string               `json:"name"`
	Title         string               `json:"title"`
	Status        string               `json:"status"`
	Experimental  bool                 `json:"experimental"`
	Date          string               `json:"date"`
	Publisher     string               `json:"publisher"`
	Description   string               `json:"description"`
	Purpose       string               `json:"purpose"`
	CaseSensitive bool                 `json:"caseSensitive"`
	Content       string               `json:"content"`
	Count         int                  `json:"count"`
	Property      []codeSystemProperty `json:"property"`
	Concept       []codeSystemConcept  `json:"concept"`
}

type codeSystemMeta struct {
	Tag []codingJSON `json:"tag,omitempty"`
}

type codingJSON struct {
	System  string `json:"system,omitempty"`
	Code    string `json:"code,omitempty"`
	Display string `json:"display,omitempty"`
}

type narrativeJSON struct {
	Status string `json:"status"`
	Div    string `json:"div"`
}

type codeSystemProperty struct {
	Code        string `json:"code"`
	Description string `json:"description"`
	Type        string `json:"type"`
}

type codeSystemConcept struct {
	Code       string                `json:"code"`
	Display    string                `json:"display"`
	Definition string                `json:"definition"`
	Property   []conceptPropertyJSON `json:"property,omitempty"`
}

type conceptPropertyJSON struct {
	Code         string `json:"code"`
	ValueCode    string `json:"valueCode,omitempty"`
	ValueString  string `json:"valueString,omitempty"`
	ValueInteger *int   `json:"valueInteger,omitempty"`
}

// Concept property codes of the CodeSystem.
const (
	propUse      = "use"
	propUnit     = "unit"
	propDecimals = "decimals"
	propFormula  = "formula"
	propSource   = "source"
	propRefused  = "refused-when"
)

// CodeSystem returns the FHIR R4 CodeSystem resource of the service (JSON,
// compact): url Site.CodeSystemURL, content "complete", every derived-value
// kind of Catalogue with its definition, UCUM unit, output precision,
// formula, published source and refusal reasons, plus the "advisory" tag and
// the "derived-physiology" category the Observations carry. Its version and
// date change only when a code is added; codes are never removed or reused.
// It fails only if the site's URL is empty.
func CodeSystem(site Site) ([]byte, error) {
	if site.CodeSystemURL == "" {
		return nil, fmt.Errorf("codesystem url: %w: empty", ErrEncode)
	}
	cs := codeSystemJSON{
		ResourceType: "CodeSystem",
		ID:           codeSystemID,
		Text: &narrativeJSON{Status: "generated",
			Div: `<div xmlns="http://www.w3.org/1999/xhtml"><p>Codes of the derived ventilation and CO2-elimination values published by ventderive, with the advisory tag and service category they carry. Every value is advisory: not an order; verify at the bedside.</p></div>`},
		URL:           site.CodeSystemURL,
		Version:       codeSystemVersion,
		Name:          codeSystemName,
		Title:         codeSystemTitle,
		Status:        "active",
		Experimental:  false,
		Date:          codeSystemDate,
		Publisher:     codeSystemPublisherString,
		Description:   "Derived CO2-elimination physiology computed by ventderive from arterial blood gases and the ventilator data around them. No LOINC code exists for these values. Each concept states its unit (UCUM), formula, published source and when the value is refused.",
		Purpose:       "Coding of advisory derived Observations (dead-space fraction, alveolar ventilation, predicted PaCO2, ventilatory ratio, end-tidal indices, ventilation for a target PaCO2).",
		CaseSensitive: true,
		Content:       "complete",
		Property: []codeSystemProperty{
			{propUse, "What the code is used for: derived-value (Observation.code), tag (Meta.tag), category (Observation.category) or airway-model (the valueCodeableConcept of an input Observation of the patient's airway)", "code"},
			{propUnit, "UCUM code of the value", "string"},
			{propDecimals, "Decimals of the published value", "integer"},
			{propFormula, "Formula of the value", "string"},
			{propSource, "Published source of the formula, with its label ([published], [derived])", "string"},
			{propRefused, "Refusal reason codes specific to the value, in the order checked", "string"},
		},
	}
	for _, k := range Catalogue {
		dec := k.Decimals
		cs.Concept = append(cs.Concept, codeSystemConcept{
			Code: k.Code, Display: k.Display, Definition: k.Definition,
			Property: []conceptPropertyJSON{
				{Code: propUse, ValueCode: "derived-value"},
				{Code: propUnit, ValueString: k.Unit},
				{Code: propDecimals, ValueInteger: &dec},
				{Code: propFormula, ValueString: k.Formula},
				{Code: propSource, ValueString: k.Source},
				{Code: propRefused, ValueString: k.Refused},
			},
		})
	}
	cs.Concept = append(cs.Concept,
		codeSystemConcept{Code: codeAdvisoryTag, Display: advisoryTagDisplay,
			Definition: "The resource holds a value computed by software from other records. It is advice for a clinician, not an order, and must be checked against the patient before anyone acts on it.",
			Property:   []conceptPropertyJSON{{Code: propUse, ValueCode: "tag"}}},
		codeSystemConcept{Code: codeDerivedCategory, Display: derivedCategoryDisplay,
			Definition: "Observations computed by ventderive from an arterial blood gas and the ventilator and patient data around it.",
			Property:   []conceptPropertyJSON{{Code: propUse, ValueCode: "category"}}},
		codeSystemConcept{Code: AirwayArtificial, Display: "Artificial airway (tracheal tube or tracheostomy)",
			Definition: "Input value: the patient breathes through a tracheal tube or a tracheostomy, which bypasses the extrathoracic airway. Predicted PaCO2 then estimates the anatomic dead space as the intrathoracic airway only, 0.43 mL per lb (0.948 mL/kg) of predicted body weight (Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6 [published]); the tube's own volume is apparatus dead space.",
			Property:   []conceptPropertyJSON{{Code: propUse, ValueCode: "airway-model"}}},
		codeSystemConcept{Code: AirwayWhole, Display: "Whole airway (no artificial airway)",
			Definition: "Input value: the patient breathes through mouth and nose, without a tracheal tube or tracheostomy (for example mask ventilation). Predicted PaCO2 then estimates the anatomic dead space of the whole conducting airway, 2.2 mL/kg of predicted body weight (about 1 mL per lb; Radford, J Appl Physiol 1955 [published]).",
			Property:   []conceptPropertyJSON{{Code: propUse, ValueCode: "airway-model"}}},
	)
	cs.Count = len(cs.Concept)
	return marshal(cs)
}
