package fhirmap

import (
	"errors"
	"fmt"
	"net/url"
	"strings"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// Defaults of a Site. The URLs use example.org, a reserved placeholder
// domain: a site replaces them with URLs it controls before it publishes.
const (
	// DefaultCodeSystemURL is the canonical URL of the service's CodeSystem
	// (derived-value codes, the advisory tag and the service category).
	DefaultCodeSystemURL = "https://ventderive.example.org/fhir/CodeSystem/derived"
	// DefaultAlgorithmURL is the base of the Provenance policy URI; the
	// policy is DefaultAlgorithmURL + "/" + Algorithm.
	DefaultAlgorithmURL = "https://ventderive.example.org/fhir/algorithm"
	// DefaultDevice is the reference of the FHIR Device that stands for the
	// service: Observation.device and the Provenance agent.
	DefaultDevice = "Device/ventderive"
	// DefaultDeviceDisplay is the display text of DefaultDevice.
	DefaultDeviceDisplay = "ventderive derivation service"
	// DefaultTargetPaCO2mmHg is the documented suggestion for a site's
	// target of the ventilation-for-target advice, in mm[Hg]: the middle of
	// the healthy adult range 35-45 mm[Hg] [published textbooks]. It is NOT
	// applied by default (DefaultSite leaves the target unset): patients with
	// chronic hypercapnia or on a permissive-hypercapnia strategy need their
	// own target, so a site sets one knowingly or gets no for-target advice.
	DefaultTargetPaCO2mmHg = 40
	// DefaultRQ is the respiratory quotient of the estimated-VCO2 method
	// (Weir step), the usual assumption for a mixed diet [common practice].
	DefaultRQ = physio.DefaultRQ
	// DefaultWindowBefore and DefaultWindowAfter bound the pairing window
	// around a blood gas; see the README section "Pairing window" for why.
	DefaultWindowBefore = 30 * time.Minute
	DefaultWindowAfter  = 10 * time.Minute
	// DefaultTemperatureWindowBefore and DefaultTemperatureWindowAfter bound
	// the window in which a body temperature is paired with a blood gas:
	// temperatures are charted hourly or less often, so the ventilator
	// window would miss most of them; see the README section "Pairing
	// window" for why 2 h before and 30 min after.
	DefaultTemperatureWindowBefore = 2 * time.Hour
	DefaultTemperatureWindowAfter  = 30 * time.Minute
	// DefaultAnatomicDeadSpace is the anatomic dead space model of predicted
	// PaCO2: a tracheal tube or tracheostomy (the ventilated adult of an
	// ICU), 0.948 mL/kg PBW of intrathoracic airway (Nunn, Campbell &
	// Peckett, J Appl Physiol 1959;14:174-6).
	DefaultAnatomicDeadSpace = physio.AnatomicArtificialAirway
)

// Site is the site configuration that selection, derivation and FHIR output
// depend on. Build it with DefaultSite and change what the site needs; the
// zero Site is not usable (Validate says why).
type Site struct {
	// ApparatusDeadSpaceML is the dead space of the apparatus between the
	// Y-piece and the patient (heat-moisture exchanger, closed-suction unit,
	// extensions), in mL; 0 is a valid value for a circuit without any.
	// It is used only when ApparatusDeadSpaceConfigured is true: predicted
	// PaCO2 is refused with "apparatus-dead-space-not-configured" otherwise,
	// never computed with a silent zero. Default: not configured.
	ApparatusDeadSpaceML         float64
	ApparatusDeadSpaceConfigured bool

	// AnatomicDeadSpace is the airway the anatomic dead space estimate of
	// predicted PaCO2 describes: physio.AnatomicArtificialAirway (tracheal
	// tube or tracheostomy: the intrathoracic airway, 0.948 mL/kg PBW) or
	// physio.AnatomicWholeAirway (mouth and nose to the alveoli, 2.2 mL/kg
	// PBW, for mask ventilation). It applies when no airway is recorded for
	// the patient (QAirway, preferred: see Select). Every predicted PaCO2
	// names the model, the figure and where the model came from. Default
	// DefaultAnatomicDeadSpace.
	AnatomicDeadSpace physio.AnatomicModel

	// Energy is the resting-energy equation of the estimated dead-space
	// fraction (VCO2 not measured). Default physio.HarrisBenedict1919, as
	// in the published method (Siddiki et al., Crit Care 2010). No command
	// sets it, so no published text promises another equation "when
	// configured"; a library caller may choose Roza-Shizgal 1984, and the
	// worked basis then names it.
	Energy physio.EnergyEquation
	// RQ is the respiratory quotient of the Weir step from energy to VCO2.
	// Default DefaultRQ (0.8), recorded as assumed (not measured); another
	// value is recorded as the site's configured value, not measured.
	RQ float64

	// TargetPaCO2mmHg is the PaCO2 the ventilation-for-target advice aims
	// at, in mm[Hg], within physio.TargetPaCO2Range. 0 means not configured
	// (the default): the two for-target kinds are then refused with
	// "target-paco2-not-configured", never computed with an assumed target.
	// When set, every for-target value states that it is the site's target,
	// not a patient-specific goal. DefaultTargetPaCO2mmHg (40) is the usual
	// suggestion.
	TargetPaCO2mmHg float64

	// CodeSystemURL is the canonical URL of the service's CodeSystem: the
	// system of every derived-value code, of the advisory tag and of the
	// service category. Default DefaultCodeSystemURL.
	CodeSystemURL string
	// AlgorithmURL is the base of the Provenance policy URI. Default
	// DefaultAlgorithmURL.
	AlgorithmURL string
	// Device is the FHIR reference of the Device that stands for the
	// service, and DeviceDisplay its display text. Defaults DefaultDevice,
	// DefaultDeviceDisplay.
	Device        string
	DeviceDisplay string

	// Window is the pairing window around an arterial blood gas. It is also
	// the staleness limit: a ventilator reading outside it is not used, so
	// a blood gas without ventilator readings in it is refused with
	// "no-ventilator-data-in-window". Patient-level facts (sex, birth date,
	// height, weight) are taken from any time: the latest at or before the
	// blood gas, else the earliest after it (see Select). Default 30 min
	// before to 10 min after.
	Window Window
	// TemperatureWindow is the window in which a measured body temperature
	// is paired with a blood gas (core sites preferred, then the nearest).
	// Default 2 h before to 30 min after.
	TemperatureWindow Window
}

// DefaultSite returns the documented defaults: apparatus dead space not
// configured, Harris-Benedict 1919 with RQ 0.8, target PaCO2 not
// configured, the example.org URLs, a window of 30 min before to 10 min
// after, the artificial-airway anatomic dead space, and a body-temperature
// window of 2 h before to 30 min after.
func DefaultSite() Site {
	return Site{
		Energy:        physio.HarrisBenedict1919,
		RQ:            DefaultRQ,
		CodeSystemURL: DefaultCodeSystemURL,
		AlgorithmURL:  DefaultAlgorithmURL,
		Device:        DefaultDevice,
		DeviceDisplay: DefaultDeviceDisplay,
		Window:        Window{Before: DefaultWindowBefore, After: DefaultWindowAfter},

		AnatomicDeadSpace: DefaultAnatomicDeadSpace,
		TemperatureWindow: Window{Before: DefaultTemperatureWindowBefore, After: DefaultTemperatureWindowAfter},
	}
}

// Validate reports every setting that is out of range or malformed, joined
// in one error; nil when the site is usable.
func (s Site) Validate() error {
	var errs []error
	if s.ApparatusDeadSpaceConfigured {
		if err := physio.ApparatusDeadSpaceRange.Check("apparatus dead space", s.ApparatusDeadSpaceML); err != nil {
			errs = append(errs, err)
		}
	}
	if s.Energy != physio.HarrisBenedict1919 && s.Energy != physio.RozaShizgal1984 {
		errs = append(errs, fmt.Errorf("energy equation %d: unknown", s.Energy))
	}
	if err := physio.RQRange.Check("RQ", s.RQ); err != nil {
		errs = append(errs, err)
	}
	if s.TargetPaCO2mmHg != 0 {
		if err := physio.TargetPaCO2Range.Check("target PaCO2", s.TargetPaCO2mmHg); err != nil {
			errs = append(errs, err)
		}
	}
	for _, u := range [...]struct{ name, url string }{{"code system URL", s.CodeSystemURL}, {"algorithm URL", s.AlgorithmURL}} {
		if p, err := url.Parse(u.url); err != nil || !p.IsAbs() || p.Host == "" || strings.ContainsAny(u.url, " |#?") {
			errs = append(errs, fmt.Errorf("%s %q: not an absolute URL without query or fragment", u.name, u.url))
		}
	}
	if typ, id, ok := strings.Cut(s.Device, "/"); !ok || typ != "Device" || !validID(id) {
		errs = append(errs, fmt.Errorf("device %q: not a Device reference", s.Device))
	}
	if s.Window.Before < 0 || s.Window.After < 0 || s.Window.Before+s.Window.After == 0 {
		errs = append(errs, fmt.Errorf("window %v before to %v after: must be non-negative and not empty", s.Window.Before, s.Window.After))
	}
	if s.AnatomicDeadSpace != physio.AnatomicWholeAirway && s.AnatomicDeadSpace != physio.AnatomicArtificialAirway {
		errs = append(errs, fmt.Errorf("anatomic dead space model %d: unknown", s.AnatomicDeadSpace))
	}
	if s.TemperatureWindow.Before < 0 || s.TemperatureWindow.After < 0 || s.TemperatureWindow.Before+s.TemperatureWindow.After == 0 {
		errs = append(errs, fmt.Errorf("temperature window %v before to %v after: must be non-negative and not empty", s.TemperatureWindow.Before, s.TemperatureWindow.After))
	}
	return errors.Join(errs...)
}

// validID reports whether id matches the FHIR id type: [A-Za-z0-9\-\.]{1,64}.
func validID(id string) bool {
	if len(id) == 0 || len(id) > 64 {
		return false
	}
	for _, c := range id {
		if !(c >= 'A' && c <= 'Z' || c >= 'a' && c <= 'z' || c >= '0' && c <= '9' || c == '-' || c == '.') {
			return false
		}
	}
	return true
}
