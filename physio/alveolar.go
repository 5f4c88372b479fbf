package physio

// DefaultBodyTemp is the body temperature assumed when a derivation is given
// a body temperature of 0 (not measured), in Cel. The assumption is recorded
// in the Result.
const DefaultBodyTemp Celsius = 37

// MethodVersion is the version of this package's implementation of every
// method; it changes when a formula, constant or rounding changes.
const MethodVersion = "1"

// stpdKelvin is the STPD reference temperature used in K. The published
// 0.863 comes from 310/273, i.e. Kelvin temperatures rounded to whole
// degrees: 0.760 x 310/273 = 0.863004. With the exact 273.15 (and 310.15 K
// at 37 Cel) K is 0.862961, 0.005 % lower: 0.002 mm[Hg] at a PaCO2 of 45
// mm[Hg], below any analyser's resolution. 273 is used so that the package
// reproduces the published constant and its check values exactly.
const stpdKelvin = 273.0

// Standard atmosphere: 760 mm[Hg] = 101.325 kPa (exact by definition of the
// atmosphere). Barometric pressure and water vapour cancel out of K.
const (
	atmMmHg = 760.0
	atmKPa  = 101.325
)

var (
	kDefMmHg = constDef{name: "K", unit: "mm[Hg].L/mL",
		source: "ideal gas law, VCO2 STPD (273 K, 760 mmHg, dry) to VA BTPS: 0.760 x (273 + T)/273; 0.863 at 37 °C [published: Wang et al., Adv Physiol Educ 2020;44:145-152]"}
	kDefKPa = constDef{name: "K", unit: "kPa.L/mL",
		source: "ideal gas law, VCO2 STPD (273 K, 101.325 kPa, dry) to VA BTPS: 0.101325 x (273 + T)/273; 0.115058 at 37 °C [derived]"}
)

// Assumptions shared by the CO2-elimination formulas.
const (
	assumeSteadyState = "steady state: CO2 eliminated equals CO2 produced; no inspired CO2 (PICO2 = 0)"
	assumeTemp37      = "body temperature not measured: 37 °C assumed"
	assumeGasStates   = "VCO2 at STPD (0 °C, 760 mmHg, dry); ventilation at BTPS (body temperature, saturated)"
)

// AlveolarConstant returns K of the alveolar ventilation equation
// PaCO2 = K x VCO2 / VA at body temperature bodyTemp, in its mm[Hg] form
// (mm[Hg].L/mL: VCO2 in mL/min STPD, VA in L/min BTPS) and its kPa form
// (kPa.L/mL).
//
// K is derived, not typed in: converting VCO2 from STPD (273 K, 760
// mm[Hg], dry) to BTPS at body temperature T and multiplying by the dry-gas
// pressure gives K(T) = 0.760 x (273 + T)/273 mm[Hg].L/mL, in which the
// barometric and water-vapour pressures cancel. At 37 Cel this is 0.863004
// (the published 0.863); the kPa form is 0.101325 x (273 + T)/273 =
// 0.115058. See stpdKelvin for the choice of 273 over 273.15.
//
// bodyTemp 0 means not measured and gives the 37 Cel values. A temperature
// that is not finite or lies outside BodyTempRange gives (0, 0), never a
// NaN; use BodyTempRange.Check for the reason.
func AlveolarConstant(bodyTemp Celsius) (mmHgForm float64, kPaForm float64) {
	if bodyTemp == 0 {
		bodyTemp = DefaultBodyTemp
	}
	if !BodyTempRange.Contains(float64(bodyTemp)) {
		return 0, 0
	}
	ratio := (stpdKelvin + float64(bodyTemp)) / stpdKelvin
	return atmMmHg / 1000 * ratio, atmKPa / 1000 * ratio
}

// alveolarK resolves the body temperature (0: 37 Cel, recorded), checks it,
// and records K in the form asked for. It returns K and the temperature used.
func (r *Result) alveolarK(bodyTemp Celsius, kPaForm bool) (float64, Celsius, error) {
	if bodyTemp == 0 {
		bodyTemp = DefaultBodyTemp
		r.assume(assumeTemp37)
	} else if err := BodyTempRange.Check("body temperature", float64(bodyTemp)); err != nil {
		return 0, 0, err
	}
	km, kk := AlveolarConstant(bodyTemp)
	if kPaForm {
		r.addConst(&kDefKPa, kk)
		return kk, bodyTemp, nil
	}
	r.addConst(&kDefMmHg, km)
	return km, bodyTemp, nil
}

const methodAlveolarEquation = "alveolar ventilation equation"

// PaCO2FromAlveolarVentilation returns the PaCO2, in mm[Hg], that CO2
// production vco2 (mL/min, STPD) gives at alveolar ventilation va (L/min,
// BTPS): PaCO2 = K(T) x VCO2 / VA. bodyTemp 0 means 37 Cel (recorded).
//
// It refuses, with an *InputError naming the input: vco2 outside
// VCO2Range, va outside AlveolarVentilationRange, bodyTemp outside
// BodyTempRange, and a computed PaCO2 outside PaCO2Range.
func PaCO2FromAlveolarVentilation(vco2 MLPerMin, va LPerMin, bodyTemp Celsius) (Result, error) {
	r := Result{Unit: UnitMmHg, Method: methodAlveolarEquation, MethodVersion: MethodVersion}
	if err := VCO2Range.Check("VCO2", float64(vco2)); err != nil {
		return Result{}, err
	}
	if err := AlveolarVentilationRange.Check("VA", float64(va)); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(bodyTemp, false)
	if err != nil {
		return Result{}, err
	}
	v := k * float64(vco2) / float64(va)
	if err := checkComputed("computed PaCO2", v, PaCO2Range); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.assume(assumeSteadyState)
	r.assume(assumeGasStates)
	r.basis("PaCO2 = K(%.1f °C) x VCO2 / VA = %.4g x %.1f mL/min / %.3f L/min = %.2f mmHg",
		float64(t), k, float64(vco2), float64(va), v)
	return r, nil
}

// PaCO2FromAlveolarVentilationKPa is PaCO2FromAlveolarVentilation with the
// result in kPa, using the kPa form of K (0.115058 kPa.L/mL at 37 Cel) so
// that the equation holds in kPa without a pressure conversion. A computed
// PaCO2 outside PaCO2RangeKPa is refused.
func PaCO2FromAlveolarVentilationKPa(vco2 MLPerMin, va LPerMin, bodyTemp Celsius) (Result, error) {
	r := Result{Unit: UnitKPa, Method: methodAlveolarEquation, MethodVersion: MethodVersion}
	if err := VCO2Range.Check("VCO2", float64(vco2)); err != nil {
		return Result{}, err
	}
	if err := AlveolarVentilationRange.Check("VA", float64(va)); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(bodyTemp, true)
	if err != nil {
		return Result{}, err
	}
	v := k * float64(vco2) / float64(va)
	if err := checkComputed("computed PaCO2", v, PaCO2RangeKPa); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.assume(assumeSteadyState)
	r.assume(assumeGasStates)
	r.basis("PaCO2 = K(%.1f °C) x VCO2 / VA = %.6f x %.1f mL/min / %.3f L/min = %.3f kPa",
		float64(t), k, float64(vco2), float64(va), v)
	return r, nil
}

// AlveolarVentilationFromPaCO2 returns the alveolar ventilation, in L/min
// (BTPS), that eliminates CO2 production vco2 (mL/min, STPD) at arterial
// PCO2 paco2 (mm[Hg]): VA = K(T) x VCO2 / PaCO2. bodyTemp 0 means 37 Cel
// (recorded).
//
// It refuses vco2 outside VCO2Range, paco2 outside PaCO2Range, bodyTemp
// outside BodyTempRange, and a computed VA outside AlveolarVentilationRange.
func AlveolarVentilationFromPaCO2(vco2 MLPerMin, paco2 MmHg, bodyTemp Celsius) (Result, error) {
	r := Result{Unit: UnitLPerMin, Method: methodAlveolarEquation, MethodVersion: MethodVersion}
	if err := VCO2Range.Check("VCO2", float64(vco2)); err != nil {
		return Result{}, err
	}
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(bodyTemp, false)
	if err != nil {
		return Result{}, err
	}
	v := k * float64(vco2) / float64(paco2)
	if err := checkComputed("computed VA", v, AlveolarVentilationRange); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.assume(assumeSteadyState)
	r.assume(assumeGasStates)
	r.basis("VA = K(%.1f °C) x VCO2 / PaCO2 = %.4g x %.1f mL/min / %.1f mmHg = %.3f L/min",
		float64(t), k, float64(vco2), float64(paco2), v)
	return r, nil
}

// AlveolarVentilationFromPaCO2KPa is AlveolarVentilationFromPaCO2 with
// paco2 in kPa (checked against PaCO2RangeKPa), using the kPa form of K.
func AlveolarVentilationFromPaCO2KPa(vco2 MLPerMin, paco2 KPa, bodyTemp Celsius) (Result, error) {
	r := Result{Unit: UnitLPerMin, Method: methodAlveolarEquation, MethodVersion: MethodVersion}
	if err := VCO2Range.Check("VCO2", float64(vco2)); err != nil {
		return Result{}, err
	}
	if err := PaCO2RangeKPa.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(bodyTemp, true)
	if err != nil {
		return Result{}, err
	}
	v := k * float64(vco2) / float64(paco2)
	if err := checkComputed("computed VA", v, AlveolarVentilationRange); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.assume(assumeSteadyState)
	r.assume(assumeGasStates)
	r.basis("VA = K(%.1f °C) x VCO2 / PaCO2 = %.6f x %.1f mL/min / %.4f kPa = %.3f L/min",
		float64(t), k, float64(vco2), float64(paco2), v)
	return r, nil
}
