package scenario

import (
	"encoding/json"
	"fmt"
	"math"
	"time"
)

// Code systems, as in the shared code table (reference/codes.md).
const (
	systemLOINC    = "http://loinc.org"
	systemMDC      = "urn:iso:std:iso:11073:10101"
	systemUCUM     = "http://unitsofmeasure.org"
	systemCategory = "http://terminology.hl7.org/CodeSystem/observation-category"
	// Invented systems of the invented hospital.
	systemMRN      = "https://fhir.larkspur.example/sid/mrn"
	systemMsgEvent = "https://fhir.larkspur.example/CodeSystem/message-event"
	fhirBase       = "https://fhir.larkspur.example/fhir/"
)

// code is one entry of the code table this package draws from. Every LOINC
// and MDC code here appears in reference/codes.md with the same meaning.
type code struct {
	system, code, display string
}

var (
	loincPaCO2    = code{systemLOINC, "2019-8", "Carbon dioxide [Partial pressure] in Arterial blood"}
	loincPvCO2    = code{systemLOINC, "2021-4", "Carbon dioxide [Partial pressure] in Venous blood"}
	loincPaO2     = code{systemLOINC, "2703-7", "Oxygen [Partial pressure] in Arterial blood"}
	loincPH       = code{systemLOINC, "2744-1", "pH of Arterial blood"}
	loincHCO3     = code{systemLOINC, "1960-4", "Bicarbonate [Moles/volume] in Arterial blood"}
	loincBE       = code{systemLOINC, "1925-7", "Base excess in Arterial blood by calculation"}
	loincABGPanel = code{systemLOINC, "24336-0", "Gas panel - Arterial blood"}
	loincPETCO2   = code{systemLOINC, "19891-1", "Carbon dioxide [Partial pressure] in Exhaled gas --at end expiration"}
	loincVCO2     = code{systemLOINC, "60825-7", "Carbon dioxide production (VCO2) in Respiratory system"}
	loincVEexp    = code{systemLOINC, "76008-2", "Expired minute Volume during Mechanical ventilation"}
	loincVEinsp   = code{systemLOINC, "76009-0", "Inspired minute Volume during Mechanical ventilation"}
	loincVT       = code{systemLOINC, "76222-9", "Tidal volume Ventilator --on ventilator"}
	loincRRtotal  = code{systemLOINC, "19840-8", "Breath rate spontaneous and mechanical --on ventilator"}
	loincFiO2     = code{systemLOINC, "3150-0", "Inhaled oxygen concentration"}
	loincFiO2Vent = code{systemLOINC, "19996-8", "Oxygen/Inspired gas Respiratory system --on ventilator"}
	loincPEEP     = code{systemLOINC, "76248-4", "PEEP Respiratory system --on ventilator"}
	loincPlateau  = code{systemLOINC, "76259-1", "Pressure.plateau Respiratory system airway --on ventilator"}
	loincWeight   = code{systemLOINC, "29463-7", "Body weight"}
	loincHeight   = code{systemLOINC, "8302-2", "Body height"}
	loincTemp     = code{systemLOINC, "8310-5", "Body temperature"}
	loincTempEso  = code{systemLOINC, "60836-4", "Esophageal temperature"}
	mdcVT         = code{systemMDC, "151980", "tidal volume delivered"}
	mdcVEinsp     = code{systemMDC, "152004", "inspired minute volume"}
	mdcRRtotal    = code{systemMDC, "152490", "total breath rate (spontaneous + mechanical)"}
	mdcETCO2      = code{systemMDC, "151708", "end-tidal CO2"}
	mdcPEEP       = code{systemMDC, "151976", "PEEP"}
	mdcPlateau    = code{systemMDC, "152424", "plateau pressure"}
	categoryLab   = code{systemCategory, "laboratory", "Laboratory"}
	categoryVital = code{systemCategory, "vital-signs", "Vital Signs"}
)

// unit is a UCUM unit with the human-readable text senders put beside it.
type unit struct{ code, text string }

var (
	unitMmHg    = unit{"mm[Hg]", "mmHg"}
	unitKPa     = unit{"kPa", "kPa"}
	unitPH      = unit{"[pH]", "pH"}
	unitMmolL   = unit{"mmol/L", "mmol/L"}
	unitLMin    = unit{"L/min", "L/min"}
	unitMLMin   = unit{"mL/min", "mL/min"}
	unitML      = unit{"mL", "mL"}
	unitPerMin  = unit{"/min", "/min"}
	unitBreaths = unit{"{breaths}/min", "breaths/min"}
	unitPercent = unit{"%", "%"}
	unitOne     = unit{"1", "1"}
	unitCmH2O   = unit{"cm[H2O]", "cmH2O"}
	unitKg      = unit{"kg", "kg"}
	unitLb      = unit{"[lb_av]", "lb"}
	unitCm      = unit{"cm", "cm"}
	unitIn      = unit{"[in_i]", "in"}
	unitCel     = unit{"Cel", "°C"}
	unitDegF    = unit{"[degF]", "°F"}
)

// mmHgPerKPa converts kPa to mm[Hg] (UCUM; reference/codes.md).
const mmHgPerKPa = 7.500638

// The JSON shapes below hold only the FHIR R4 elements this package emits,
// in the order FHIR's own examples use, so that output is byte-stable.

type jsonCoding struct {
	System  string `json:"system"`
	Code    string `json:"code"`
	Display string `json:"display,omitempty"`
}

type jsonConcept struct {
	Coding []jsonCoding `json:"coding"`
}

type jsonRef struct {
	Reference string `json:"reference,omitempty"`
	Display   string `json:"display,omitempty"`
}

type jsonQuantity struct {
	Value  float64 `json:"value"`
	Unit   string  `json:"unit"`
	System string  `json:"system"`
	Code   string  `json:"code"`
}

type jsonMeta struct {
	VersionID   string `json:"versionId,omitempty"`
	LastUpdated string `json:"lastUpdated,omitempty"`
}

type jsonComponent struct {
	Code          jsonConcept   `json:"code"`
	ValueQuantity *jsonQuantity `json:"valueQuantity,omitempty"`
}

type jsonObservation struct {
	ResourceType      string          `json:"resourceType"`
	ID                string          `json:"id"`
	Meta              *jsonMeta       `json:"meta,omitempty"`
	Status            string          `json:"status"`
	Category          []jsonConcept   `json:"category,omitempty"`
	Code              jsonConcept     `json:"code"`
	Subject           *jsonRef        `json:"subject,omitempty"`
	Encounter         *jsonRef        `json:"encounter,omitempty"`
	EffectiveDateTime string          `json:"effectiveDateTime"`
	Issued            string          `json:"issued,omitempty"`
	ValueQuantity     *jsonQuantity   `json:"valueQuantity,omitempty"`
	Device            *jsonRef        `json:"device,omitempty"`
	HasMember         []jsonRef       `json:"hasMember,omitempty"`
	Component         []jsonComponent `json:"component,omitempty"`
}

type jsonIdentifier struct {
	System string `json:"system"`
	Value  string `json:"value"`
}

type jsonPatient struct {
	ResourceType string           `json:"resourceType"`
	ID           string           `json:"id"`
	Meta         *jsonMeta        `json:"meta,omitempty"`
	Identifier   []jsonIdentifier `json:"identifier"`
	Active       bool             `json:"active"`
	Gender       string           `json:"gender"`
	BirthDate    string           `json:"birthDate"`
}

type jsonMessageSource struct {
	Name     string `json:"name"`
	Endpoint string `json:"endpoint"`
}

type jsonMessageHeader struct {
	ResourceType string            `json:"resourceType"`
	ID           string            `json:"id"`
	EventCoding  jsonCoding        `json:"eventCoding"`
	Source       jsonMessageSource `json:"source"`
	Focus        []jsonRef         `json:"focus,omitempty"`
}

type jsonRequest struct {
	Method string `json:"method"`
	URL    string `json:"url"`
}

type jsonEntry struct {
	FullURL  string          `json:"fullUrl"`
	Resource json.RawMessage `json:"resource"`
	Request  *jsonRequest    `json:"request,omitempty"`
}

type jsonBundle struct {
	ResourceType string      `json:"resourceType"`
	ID           string      `json:"id"`
	Type         string      `json:"type"`
	Timestamp    string      `json:"timestamp,omitempty"`
	Entry        []jsonEntry `json:"entry"`
}

// mustJSON marshals v. The types above cannot fail to marshal (no maps with
// odd keys, no channels, and values are rounded finite numbers), so an
// error is a programming mistake.
func mustJSON(v any) []byte {
	b, err := json.Marshal(v)
	if err != nil {
		panic(fmt.Sprintf("scenario: marshal %T: %v", v, err))
	}
	return b
}

func concept(codes ...code) jsonConcept {
	c := jsonConcept{Coding: make([]jsonCoding, 0, len(codes))}
	for _, k := range codes {
		c.Coding = append(c.Coding, jsonCoding{System: k.system, Code: k.code, Display: k.display})
	}
	return c
}

// qty rounds v to the given number of decimals, as a device or analyser
// would display it. A non-finite v is a bug in a story and panics.
func qty(v float64, decimals int, u unit) *jsonQuantity {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		panic("scenario: non-finite value")
	}
	p := math.Pow(10, float64(decimals))
	return &jsonQuantity{Value: math.Round(v*p) / p, Unit: u.text, System: systemUCUM, Code: u.code}
}

// fhirTime formats t as a FHIR dateTime with its zone, to the second.
func fhirTime(t time.Time) string { return t.Format(time.RFC3339) }
