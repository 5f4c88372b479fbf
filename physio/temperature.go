package physio

import "math"

// PCO2TempCoefficient is the temperature coefficient of blood PCO2 in vitro,
// log10 per degree: PCO2(T2) / PCO2(T1) = 10^(0.019 x (T2 - T1)) for blood
// sealed from air. It was measured in fresh human blood over 18 °C ("Temperature
// coefficients for Pco2 and Po2 of blood in vitro", J Appl Physiol, submitted
// 1964 [published]); Bradley, Severinghaus & Stupfel (J Appl Physiol
// 1956;9:201-4 [published]) computed 0.0185 (4.4 % per °C). Blood-gas
// analysers use 0.019 (Corning and Instrumentation Laboratory) or 0.021
// (Radiometer ABL-3) [published: medicalalgorithms.com, correction of pCO2
// for temperature], so a laboratory's own corrected value may differ from
// this one by up to 0.5 % per °C.
const PCO2TempCoefficient = 0.019

// analyserTemp is the temperature at which a blood-gas analyser measures
// PCO2 and reports it unless asked to correct it [common practice].
const analyserTemp Celsius = 37

var pco2TempDef = constDef{name: "PCO2 temperature coefficient (log10 per °C)", unit: "/K",
	source: "fresh human blood in vitro, 'Temperature coefficients for Pco2 and Po2 of blood in vitro', J Appl Physiol (submitted 1964) [published]; 0.0185 in Bradley, Severinghaus & Stupfel, J Appl Physiol 1956;9:201-4 [published]"}

// TemperatureConvention names the one convention every temperature-dependent
// value follows; fhirmap writes it into the basis.
const TemperatureConvention = "blood PCO2 is measured at 37 °C and corrected to the measured body temperature (10^(0.019 x (T - 37))) wherever it meets gas-phase quantities (VCO2, minute volume, PECO2, PETCO2), since CO2 exchange happens at body temperature; predicted PaCO2 is given back at 37 °C, as the blood gas is reported"

const (
	methodPCO2Temp    = "temperature correction of blood PCO2 (in vitro coefficient 0.019)"
	assumePCO2Temp    = "PaCO2 measured at 37 °C (the analyser's temperature) and corrected to the measured body temperature, where CO2 exchange with alveolar gas happens"
	assumePCO2NotTemp = "body temperature not measured: PaCO2 used as measured at 37 °C, without temperature correction"
)

// PCO2TempFactor returns 10^(0.019 x (to - from)): the factor that turns a
// blood PCO2 at temperature from into the PCO2 of the same blood at
// temperature to (both in Cel). It does not check its inputs.
func PCO2TempFactor(from, to Celsius) float64 {
	return math.Pow(10, PCO2TempCoefficient*float64(to-from))
}

// PaCO2AtBodyTemp returns the arterial PCO2, in mm[Hg], at the patient's
// body temperature bodyTemp from a PaCO2 measured at 37 Cel:
// PaCO2(T) = PaCO2(37) x 10^(0.019 x (T - 37)) (PCO2TempCoefficient).
// At 33.5 Cel a PaCO2 of 45 mm[Hg] is 38.61 mm[Hg]; at 39 Cel, 49.11.
//
// It refuses paco2 outside PaCO2Range, a bodyTemp of 0 (not measured:
// ErrNotGiven; the caller then uses the 37 Cel value and says so with
// NoteUncorrectedPaCO2) and a bodyTemp outside BodyTempRange.
func PaCO2AtBodyTemp(paco2 MmHg, bodyTemp Celsius) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if bodyTemp == 0 {
		return Result{}, &InputError{Input: "body temperature", Value: 0, Unit: UnitCelsius, Kind: ErrNotGiven,
			Detail: "a measured body temperature; without one PaCO2 is used as measured at 37 °C"}
	}
	if err := BodyTempRange.Check("body temperature", float64(bodyTemp)); err != nil {
		return Result{}, err
	}
	f := PCO2TempFactor(analyserTemp, bodyTemp)
	v := float64(paco2) * f
	r := Result{Value: v, Unit: UnitMmHg, Method: methodPCO2Temp, MethodVersion: MethodVersion}
	r.addConst(&pco2TempDef, PCO2TempCoefficient)
	r.assume(assumePCO2Temp)
	r.basis("PaCO2(%.1f °C) = PaCO2(37 °C) x 10^(0.019 x (%.1f °C - 37 °C)) = %.1f mmHg x %.4f = %.2f mmHg",
		float64(bodyTemp), float64(bodyTemp), float64(paco2), f, v)
	return r, nil
}

// NoteUncorrectedPaCO2 records that no body temperature was measured, so the
// PaCO2 was used as measured at 37 Cel; the caller, who knows whether a
// temperature was found, decides. Adding it twice adds it once.
func (r *Result) NoteUncorrectedPaCO2() {
	for _, a := range r.assumptions[:r.nAssumptions] {
		if a == assumePCO2NotTemp {
			return
		}
	}
	r.assume(assumePCO2NotTemp)
}
