package fhirmap

import (
	"bufio"
	"bytes"
	"cmp"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"slices"
	"strings"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/ventderive/ventderive/physio"
)

// Code systems the decoder matches. A code is matched only together with
// its system: LOINC "2019-8" sent with any other system is not PaCO2.
const (
	LOINCSystem     = "http://loinc.org"
	MDCSystem       = "urn:iso:std:iso:11073:10101" // ISO/IEEE 11073-10101 nomenclature
	SNOMEDSystem    = "http://snomed.info/sct"
	GenderSystem    = "http://hl7.org/fhir/administrative-gender"
	PatientGender   = "Patient.gender"    // Fact.Code.Code of a sex fact read from a Patient
	PatientBirthday = "Patient.birthDate" // Fact.Code.Code of a birth-date fact read from a Patient
	// GoalNoPaCO2Target is Fact.Code.Code of the (never used) fact of a Goal
	// version without a PaCO2 target.
	GoalNoPaCO2Target = "Goal.target"
)

// SNOMED CT specimen-type concepts the decoder reads from a Specimen
// (verified against public FHIR examples and implementation guides, which
// pair each code with this display).
const (
	SNOMEDArterialBlood  = "122552005" // Arterial blood specimen
	SNOMEDVenousBlood    = "122555007" // Venous blood specimen
	SNOMEDCapillaryBlood = "122554006" // Capillary blood specimen
)

// CodeInfo is what one code means to the service.
type CodeInfo struct {
	System  string
	Code    string
	Display string // the LOINC long common name, or the MDC meaning

	// Quantity is the quantity the code measures; "" for a panel code.
	Quantity Quantity
	Origin   Origin
	// Detail refines the quantity: minute volume "expired", "inspired" or
	// "set"; tidal volume "set", "delivered", "expired" or "total"; breath
	// rate "set", "total", "mechanical" or "spontaneous"; FiO2 "inhaled",
	// "inspired" or "set"; body temperature "core" or "peripheral"; "" when
	// the code says nothing more.
	Detail string
	// Specimen is the blood the code names: arterial for 2019-8, unknown for
	// the unspecified-specimen codes (11557-6, 11558-4, 1959-6, 11555-0,
	// 24338-6), which the Observation's specimen may settle; SpecimenNone for
	// values that are not from blood.
	Specimen      Specimen
	TempCorrected bool // LOINC 32771-8
	// Panel marks a panel code (24336-0 and siblings): its components and
	// members inherit Specimen.
	Panel bool
	// AliasOf is the LOINC code a site alias maps to, or "" for a standard
	// entry and for an alias that names its quantity directly.
	AliasOf string
}

type codeKey struct{ system, code string }

// CodeTable maps (system, code) to CodeInfo. The default table holds every
// LOINC and MDC input code of the service; a site adds local codes with
// WithAliases. A CodeTable is immutable after construction and safe for
// concurrent use.
type CodeTable struct {
	m map[codeKey]CodeInfo
	// serviceSystem is the URL of the service's CodeSystem, whose
	// airway-model codes an airway Observation may send
	// (WithCodeSystemURL); "" means DefaultCodeSystemURL.
	serviceSystem string
}

// SNOMED CT physical-object concepts an airway Observation (QAirway) may
// send as its value: both are artificial airways that bypass the
// extrathoracic airway. Verified against the HL7 Germany GECCO value set
// "Respiratory Therapy Devices" (SNOMED CT 26412008 "Endotracheal tube,
// device (physical object)", 129121000 "Tracheostomy tube, device (physical
// object)") and the OMOP CDM ventilation conventions, which pair each code
// with this meaning.
const (
	SNOMEDEndotrachealTube = "26412008"
	SNOMEDTracheostomyTube = "129121000"
)

// AirwayArtificial and AirwayWhole are the codes of the service's
// CodeSystem (Site.CodeSystemURL) an airway Observation may send as its
// value: the physio.AnatomicModel names. No SNOMED CT concept for "no
// artificial airway" was verified, so the whole-airway model is read only
// from the service's own code.
const (
	AirwayArtificial = "artificial-airway"
	AirwayWhole      = "whole-airway"
)

// WithCodeSystemURL returns a copy of t whose airway Observations read the
// service's own airway-model codes (AirwayArtificial, AirwayWhole) under
// url, the site's CodeSystem URL (Site.CodeSystemURL); the default table
// reads them under DefaultCodeSystemURL. t is not modified.
func (t *CodeTable) WithCodeSystemURL(url string) *CodeTable {
	base := t
	if base == nil {
		base = defaultTable
	}
	return &CodeTable{m: base.m, serviceSystem: url}
}

// airwayModel reads the anatomic dead space model from the value of an
// airway Observation: SNOMED CT endotracheal or tracheostomy tube, or the
// service's own codes. It returns the reason to ignore the value instead:
// "unsupported-value" when no coding is one of these, "conflicting-codes"
// when two codings name different models.
func (t *CodeTable) airwayModel(cc *fhir.CodeableConcept) (physio.AnatomicModel, string) {
	own := DefaultCodeSystemURL
	if t != nil && t.serviceSystem != "" {
		own = t.serviceSystem
	}
	var (
		model physio.AnatomicModel
		found bool
	)
	for _, c := range cc.Coding {
		sys, code := deref(c.System), deref(c.Code)
		var m physio.AnatomicModel
		switch {
		case sys == SNOMEDSystem && (code == SNOMEDEndotrachealTube || code == SNOMEDTracheostomyTube),
			sys == own && code == AirwayArtificial:
			m = physio.AnatomicArtificialAirway
		case sys == own && code == AirwayWhole:
			m = physio.AnatomicWholeAirway
		default:
			continue
		}
		if found && m != model {
			return 0, "conflicting-codes"
		}
		model, found = m, true
	}
	if !found {
		return 0, "unsupported-value"
	}
	return model, ""
}

// Lookup returns what (system, code) means. It reports false for a code the
// table does not hold, including a known code sent with a different system.
func (t *CodeTable) Lookup(system, code string) (CodeInfo, bool) {
	if t == nil {
		return CodeInfo{}, false
	}
	ci, ok := t.m[codeKey{system, code}]
	return ci, ok
}

// Entries lists the table sorted by system then code, for catalogues and
// tests.
func (t *CodeTable) Entries() []CodeInfo {
	if t == nil {
		return nil
	}
	out := slices.Collect(maps.Values(t.m))
	slices.SortFunc(out, func(a, b CodeInfo) int {
		return cmp.Or(strings.Compare(a.System, b.System), strings.Compare(a.Code, b.Code))
	})
	return out
}

// Len returns the number of codes in the table.
func (t *CodeTable) Len() int {
	if t == nil {
		return 0
	}
	return len(t.m)
}

// loinc builds a default LOINC entry.
func loinc(code, display string, q Quantity, o Origin, detail string, sp Specimen) CodeInfo {
	return CodeInfo{System: LOINCSystem, Code: code, Display: display, Quantity: q, Origin: o, Detail: detail, Specimen: sp}
}

// defaultLOINC is the LOINC part of shared reference codes.md, plus the
// unspecified-specimen codes that reference warns are often mislabelled
// "arterial" (they are mapped as SpecimenUnknown, never as arterial).
var defaultLOINC = []CodeInfo{
	// Blood gas.
	loinc("2019-8", "Carbon dioxide [Partial pressure] in Arterial blood", QPCO2, OriginMeasured, "", SpecimenArterial),
	loinc("2021-4", "Carbon dioxide [Partial pressure] in Venous blood", QPCO2, OriginMeasured, "", SpecimenVenous),
	loinc("2020-6", "Carbon dioxide [Partial pressure] in Capillary blood", QPCO2, OriginMeasured, "", SpecimenCapillary),
	loinc("19212-0", "Carbon dioxide [Partial pressure] in Mixed venous blood", QPCO2, OriginMeasured, "", SpecimenMixedVenous),
	loinc("11557-6", "Carbon dioxide [Partial pressure] in Blood", QPCO2, OriginMeasured, "", SpecimenUnknown),
	func() CodeInfo {
		ci := loinc("32771-8", "Carbon dioxide [Partial pressure] adjusted to patient's actual temperature in Arterial blood", QPCO2, OriginMeasured, "", SpecimenArterial)
		ci.TempCorrected = true
		return ci
	}(),
	loinc("2703-7", "Oxygen [Partial pressure] in Arterial blood", QPO2, OriginMeasured, "", SpecimenArterial),
	loinc("2744-1", "pH of Arterial blood", QPH, OriginMeasured, "", SpecimenArterial),
	loinc("11558-4", "pH of Blood", QPH, OriginMeasured, "", SpecimenUnknown),
	loinc("1960-4", "Bicarbonate [Moles/volume] in Arterial blood", QBicarbonate, OriginMeasured, "", SpecimenArterial),
	loinc("1959-6", "Bicarbonate [Moles/volume] in Blood", QBicarbonate, OriginMeasured, "", SpecimenUnknown),
	loinc("1925-7", "Base excess in Arterial blood by calculation", QBaseExcess, OriginCalculated, "", SpecimenArterial),
	loinc("11555-0", "Base excess in Blood by calculation", QBaseExcess, OriginCalculated, "", SpecimenUnknown),
	{System: LOINCSystem, Code: "24336-0", Display: "Gas panel - Arterial blood", Specimen: SpecimenArterial, Panel: true},
	{System: LOINCSystem, Code: "24338-6", Display: "Gas panel - Blood", Specimen: SpecimenUnknown, Panel: true},
	{System: LOINCSystem, Code: "24339-4", Display: "Gas panel - Venous blood", Specimen: SpecimenVenous, Panel: true},
	{System: LOINCSystem, Code: "24337-8", Display: "Gas panel - Capillary blood", Specimen: SpecimenCapillary, Panel: true},

	// Ventilation and gas exchange.
	loinc("19891-1", "Carbon dioxide [Partial pressure] in Exhaled gas --at end expiration", QPETCO2, OriginMeasured, "", SpecimenNone),
	loinc("19890-3", "Carbon dioxide [Partial pressure] in Exhaled gas by Calculated --at end expiration", QPETCO2, OriginCalculated, "", SpecimenNone),
	loinc("19889-5", "Carbon dioxide/Gas.total.at end expiration in Exhaled gas", QFETCO2, OriginMeasured, "", SpecimenNone),
	loinc("60825-7", "Carbon dioxide production (VCO2) in Respiratory system", QVCO2, OriginMeasured, "", SpecimenNone),
	loinc("76008-2", "Expired minute Volume during Mechanical ventilation", QMinuteVol, OriginMeasured, "expired", SpecimenNone),
	loinc("76009-0", "Inspired minute Volume during Mechanical ventilation", QMinuteVol, OriginMeasured, "inspired", SpecimenNone),
	loinc("75959-7", "Volume expired per minute Respiratory system", QMinuteVol, OriginMeasured, "expired", SpecimenNone),
	loinc("33425-0", "Minute volume setting Ventilator", QMinuteVol, OriginSetting, "set", SpecimenNone),
	loinc("20112-9", "Tidal volume setting Ventilator", QTidalVol, OriginSetting, "set", SpecimenNone),
	loinc("76222-9", "Tidal volume Ventilator --on ventilator", QTidalVol, OriginMeasured, "delivered", SpecimenNone),
	loinc("76007-4", "Tidal volume expired Respiratory system airway --on ventilator", QTidalVol, OriginMeasured, "expired", SpecimenNone),
	loinc("20118-6", "Tidal volume.spontaneous+mechanical --on ventilator", QTidalVol, OriginMeasured, "total", SpecimenNone),
	loinc("9279-1", "Respiratory rate", QRespRate, OriginMeasured, "", SpecimenNone),
	loinc("19834-1", "Breath rate setting Ventilator", QRespRate, OriginSetting, "set", SpecimenNone),
	loinc("33438-3", "Breath rate mechanical --on ventilator", QRespRate, OriginMeasured, "mechanical", SpecimenNone),
	loinc("19840-8", "Breath rate spontaneous and mechanical --on ventilator", QRespRate, OriginMeasured, "total", SpecimenNone),
	loinc("19839-0", "Breath rate spontaneous --on ventilator", QRespRate, OriginMeasured, "spontaneous", SpecimenNone),
	loinc("3150-0", "Inhaled oxygen concentration", QFiO2, OriginMeasured, "inhaled", SpecimenNone),
	loinc("19996-8", "Oxygen/Inspired gas Respiratory system --on ventilator", QFiO2, OriginMeasured, "inspired", SpecimenNone),
	loinc("19994-3", "Oxygen/Total gas setting [Volume Fraction] Ventilator", QFiO2, OriginSetting, "set", SpecimenNone),
	loinc("20077-4", "Positive end expiratory pressure setting Ventilator", QPEEP, OriginSetting, "set", SpecimenNone),
	loinc("76248-4", "PEEP Respiratory system --on ventilator", QPEEP, OriginMeasured, "", SpecimenNone),
	loinc("76259-1", "Pressure.plateau Respiratory system airway --on ventilator", QPlateau, OriginMeasured, "", SpecimenNone),
	loinc("76530-5", "Mean pressure Respiratory system airway --on ventilator", QMeanAirway, OriginMeasured, "", SpecimenNone),
	loinc("50984-4", "Horowitz index in Arterial blood (PaO2/FiO2)", QPFRatio, OriginCalculated, "", SpecimenArterial),

	// The patient.
	loinc("29463-7", "Body weight", QWeight, OriginMeasured, "", SpecimenNone),
	loinc("8302-2", "Body height", QHeight, OriginMeasured, "", SpecimenNone),
	loinc("8310-5", "Body temperature", QBodyTemp, OriginMeasured, "", SpecimenNone),
	// Body temperature by site (codes as the MII-ICU and ISiK guides pair
	// them): core sites are preferred over a site not stated and over a
	// peripheral site, since peripheral temperatures lag and differ from
	// core temperature [common practice].
	loinc("8329-5", "Body temperature - Core", QBodyTemp, OriginMeasured, "core", SpecimenNone),
	loinc("8332-9", "Rectal temperature", QBodyTemp, OriginMeasured, "core", SpecimenNone),
	loinc("60836-4", "Esophageal temperature", QBodyTemp, OriginMeasured, "core", SpecimenNone),
	loinc("60838-0", "Nasopharyngeal temperature", QBodyTemp, OriginMeasured, "core", SpecimenNone),
	loinc("8334-5", "Body temperature - Urinary bladder", QBodyTemp, OriginMeasured, "core", SpecimenNone),
	loinc("76010-8", "Nasal temperature", QBodyTemp, OriginMeasured, "peripheral", SpecimenNone),
	loinc("76689-9", "Sex assigned at birth", QSex, OriginMeasured, "", SpecimenNone),
	loinc("46098-0", "Sex", QSex, OriginMeasured, "", SpecimenNone),
}

// defaultMDC pairs each ISO/IEEE 11073 code of shared reference codes.md with
// the LOINC code whose meaning it takes.
var defaultMDC = []struct{ code, display, loinc string }{
	{"151980", "tidal volume delivered", "76222-9"},
	{"16929196", "tidal volume setting", "20112-9"},
	{"152004", "inspired minute volume", "76009-0"},
	{"151586", "ventilator breath rate", "33438-3"},
	{"152490", "total breath rate (spontaneous + mechanical)", "19840-8"},
	{"152498", "spontaneous breath rate", "19839-0"},
	{"151708", "end-tidal CO2", "19891-1"},
	{"151976", "PEEP", "76248-4"},
	{"152424", "plateau pressure", "76259-1"},
	{"151975", "mean airway pressure", "76530-5"},
	{"150368", "core body temperature", "8329-5"},
	{"188420", "rectal temperature", "8332-9"},
	{"150372", "esophageal temperature", "60836-4"},
	{"150380", "nasopharyngeal temperature", "60838-0"},
	{"188504", "nasal temperature", "76010-8"},
}

var defaultTable = buildDefault()

func buildDefault() *CodeTable {
	t := &CodeTable{m: make(map[codeKey]CodeInfo, len(defaultLOINC)+len(defaultMDC))}
	for _, ci := range defaultLOINC {
		t.m[codeKey{ci.System, ci.Code}] = ci
	}
	for _, d := range defaultMDC {
		ci := t.m[codeKey{LOINCSystem, d.loinc}]
		ci.System, ci.Code, ci.Display = MDCSystem, d.code, d.display
		t.m[codeKey{MDCSystem, d.code}] = ci
	}
	return t
}

// DefaultCodes returns the standard code table: every LOINC and MDC code the
// service reads. The table is shared and immutable; WithAliases returns a
// new one.
func DefaultCodes() *CodeTable { return defaultTable }

// Alias is one line of a site alias file. The file is JSON Lines: one JSON
// object per line; blank lines and lines starting with "#" are skipped.
// Either Maps names the LOINC code of the default table whose meaning the
// local code takes, or Quantity (with Origin, Detail and Specimen) names the
// meaning directly, for quantities without a LOINC code such as "peco2":
//
//	{"system": "urn:oid:1.2.3.4.5", "code": "PACO2", "maps": "2019-8"}
//	{"system": "https://larkspur.example/codes", "code": "PECO2", "quantity": "peco2", "origin": "measured"}
//
// Unknown keys, a system of LOINC or MDC (standard codes cannot be
// redefined), an unknown LOINC target, an unknown quantity and a code given
// twice are refused with the line number.
type Alias struct {
	System   string   `json:"system"`
	Code     string   `json:"code"`
	Display  string   `json:"display,omitempty"`
	Maps     string   `json:"maps,omitempty"`
	Quantity Quantity `json:"quantity,omitempty"`
	Origin   Origin   `json:"origin,omitempty"`
	Detail   string   `json:"detail,omitempty"`
	Specimen Specimen `json:"specimen,omitempty"`
}

// maxAliasLine bounds one line of an alias file.
const maxAliasLine = 64 << 10

// WithAliases returns a copy of t extended with the aliases read from r
// (format: see Alias). t is not modified. Errors name the line.
func (t *CodeTable) WithAliases(r io.Reader) (*CodeTable, error) {
	base := t
	if base == nil {
		base = defaultTable
	}
	out := &CodeTable{m: maps.Clone(base.m), serviceSystem: base.serviceSystem}
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 0, 4096), maxAliasLine)
	line := 0
	for sc.Scan() {
		line++
		text := bytes.TrimSpace(sc.Bytes())
		if len(text) == 0 || text[0] == '#' {
			continue
		}
		ci, err := parseAlias(text, base)
		if err != nil {
			return nil, fmt.Errorf("alias line %d: %w", line, err)
		}
		k := codeKey{ci.System, ci.Code}
		if _, dup := out.m[k]; dup {
			return nil, fmt.Errorf("alias line %d: code %s|%s is already in the table", line, quoteShort(ci.System), quoteShort(ci.Code))
		}
		out.m[k] = ci
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("read aliases: %w", err)
	}
	return out, nil
}

func parseAlias(text []byte, base *CodeTable) (CodeInfo, error) {
	dec := json.NewDecoder(bytes.NewReader(text))
	dec.DisallowUnknownFields()
	var a Alias
	if err := dec.Decode(&a); err != nil {
		return CodeInfo{}, fmt.Errorf("parse alias: %w", err)
	}
	if dec.More() {
		return CodeInfo{}, fmt.Errorf("parse alias: more than one JSON value on the line")
	}
	switch {
	case a.System == "" || a.Code == "":
		return CodeInfo{}, fmt.Errorf("system and code are required")
	case a.System == LOINCSystem || a.System == MDCSystem:
		return CodeInfo{}, fmt.Errorf("standard system %s cannot be aliased", a.System)
	case strings.TrimSpace(a.System) != a.System || strings.TrimSpace(a.Code) != a.Code:
		return CodeInfo{}, fmt.Errorf("system and code must not have surrounding spaces")
	}
	if a.Maps != "" {
		if a.Quantity != "" || a.Origin != "" || a.Detail != "" || a.Specimen != "" {
			return CodeInfo{}, fmt.Errorf("give either maps or quantity, not both")
		}
		target, ok := base.Lookup(LOINCSystem, a.Maps)
		if !ok {
			return CodeInfo{}, fmt.Errorf("maps: LOINC %s is not in the code table", quoteShort(a.Maps))
		}
		target.System, target.Code, target.AliasOf = a.System, a.Code, a.Maps
		target.Display = cmp.Or(a.Display, target.Display)
		return target, nil
	}
	if !a.Quantity.known() {
		return CodeInfo{}, fmt.Errorf("quantity %s is not known", quoteShort(string(a.Quantity)))
	}
	if a.Quantity == QTargetPaCO2 {
		// A patient's target is a plan, not a measurement: it comes only from
		// a FHIR Goal, never from an Observation with a local code.
		return CodeInfo{}, fmt.Errorf("quantity %s is read only from a FHIR Goal", quoteShort(string(a.Quantity)))
	}
	switch a.Origin {
	case OriginMeasured, OriginSetting, OriginCalculated:
	case "":
		a.Origin = OriginMeasured
	default:
		return CodeInfo{}, fmt.Errorf("origin %s is not known", quoteShort(string(a.Origin)))
	}
	switch a.Specimen {
	case SpecimenNone, SpecimenArterial, SpecimenVenous, SpecimenCapillary, SpecimenMixedVenous, SpecimenUnknown:
	default:
		return CodeInfo{}, fmt.Errorf("specimen %s is not known", quoteShort(string(a.Specimen)))
	}
	return CodeInfo{System: a.System, Code: a.Code, Display: a.Display, Quantity: a.Quantity,
		Origin: a.Origin, Detail: a.Detail, Specimen: a.Specimen}, nil
}
