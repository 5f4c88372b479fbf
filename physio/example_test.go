package physio_test

import (
	"errors"
	"fmt"

	"github.com/ventderive/ventderive/physio"
)

// The values below are the reference vectors of the shared physiology
// reference (invented patient: man, 175 cm, 70 kg, 40 years).

func ExampleAlveolarConstant() {
	for _, temp := range []physio.Celsius{35, 37, 40} {
		mmHg, kPa := physio.AlveolarConstant(temp)
		fmt.Printf("%.0f °C: K = %.5f mmHg.L/mL = %.6f kPa.L/mL\n", temp, mmHg, kPa)
	}
	// Output:
	// 35 °C: K = 0.85744 mmHg.L/mL = 0.114315 kPa.L/mL
	// 37 °C: K = 0.86300 mmHg.L/mL = 0.115058 kPa.L/mL
	// 40 °C: K = 0.87136 mmHg.L/mL = 0.116171 kPa.L/mL
}

func ExamplePaCO2FromAlveolarVentilation() {
	r, err := physio.PaCO2FromAlveolarVentilation(200, 4.2, 37)
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("%.2f %s\n%s\n", r.Value, physio.DisplayUnit(r.Unit), r.Basis())
	// Output:
	// 41.10 mmHg
	// PaCO2 = K(37.0 °C) x VCO2 / VA = 0.863 x 200.0 mL/min / 4.200 L/min = 41.10 mmHg
}

func ExampleDeadSpaceFromVCO2() {
	r, err := physio.DeadSpaceFromVCO2(45, 200, 10, 37)
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("%.4f (%s)\n%s\n[%s] %s\n", r.Value, r.Method, r.Basis(), r.Interpretation.Code, r.Interpretation.Source)
	// Output:
	// 0.6164 (Bohr-Enghoff, PECO2 from VCO2 and expired minute volume)
	// VD/VT = 1 - K(37.0 °C) x VCO2 / (VE x PaCO2) = 1 - 0.863 x 200.0 mL/min / (10.00 L/min x 45.0 mmHg) = 0.6164
	// [H] Nunn & Hill, J Appl Physiol 1960; Nuckton et al., NEJM 2002;346:1281-6
}

func ExampleDeadSpaceEnghoff() {
	r, _ := physio.DeadSpaceEnghoff(40, 27)
	vd, _ := physio.DeadSpaceVolume(physio.Fraction(r.Value), 500)
	fmt.Println(r.Basis())
	fmt.Println(vd.Basis())
	// Output:
	// VD/VT = (PaCO2 - PECO2) / PaCO2 = (40.0 mmHg - 27.0 mmHg) / 40.0 mmHg = 0.3250
	// VD = VD/VT x VT = 0.3250 x 500 mL = 162.5 mL
}

func ExampleDeadSpaceEstimated() {
	e := physio.EnergyInput{Sex: physio.Male, Age: 40, Weight: 70, Height: 175, Equation: physio.HarrisBenedict1919}
	r, err := physio.DeadSpaceEstimated(45, 10, e)
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("%.4f\n", r.Value)
	for _, a := range r.Assumptions() {
		fmt.Println("-", a)
	}
	// Output:
	// 0.6404
	// - estimated: resting energy expenditure from a population equation on actual body weight, not measured by calorimetry
	// - respiratory quotient not measured: 0.8 assumed
	// - estimated: VCO2 from resting energy expenditure and the Weir equation, not measured
	// - steady state: CO2 eliminated equals CO2 produced; no inspired CO2 (PICO2 = 0)
	// - VE is the minute volume supplied; the published method used ventilator rate x expired tidal volume
}

func ExampleVentilatoryRatio() {
	pbw, _ := physio.PredictedBodyWeight(physio.Male, 175)
	r, _ := physio.VentilatoryRatio(10, 45, physio.Kg(pbw.Value))
	fmt.Println(pbw.Basis())
	fmt.Println(r.Basis())
	// Output:
	// PBW (male) = 50 kg + 0.91 kg/cm x (175.0 cm - 152.4 cm) = 70.566 kg
	// VR = (VE x PaCO2) / (PBW x 100 mL/kg/min x 37.5 mmHg) = (10000 mL/min x 45.0 mmHg) / (70.566 kg x 100 mL/kg/min x 37.5 mmHg) = 1.7005
}

func ExamplePredictedPaCO2() {
	pred, err := physio.PredictedPaCO2(physio.PredictedInput{
		VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150,
		ApparatusVD: 120, ApparatusVDKnown: true, // HME and closed suction, declared for the circuit
		BodyTemp: 37,
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	diff, _ := physio.PaCO2Discrepancy(65, physio.MmHg(pred.Value), physio.VCO2Measured)
	fmt.Println(pred.Basis())
	fmt.Printf("%.2f %s: %s\n", diff.Value, physio.DisplayUnit(diff.Unit), diff.Interpretation.Text)

	_, err = physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150})
	fmt.Println(errors.Is(err, physio.ErrNotGiven), err)
	// Output:
	// VA = (VT - VDanat - VDapp) x RR = (420 mL - 150.0 mL - 120 mL) x 20.0 /min = 3.000 L/min; PaCO2 = K(37.0 °C) x VCO2 / VA = 0.863 x 200.0 mL/min / 3.000 L/min = 57.53 mmHg
	// 7.47 mmHg: measured PaCO2 more than 5 mmHg above predicted: likely more dead space than assumed (alveolar dead space), or an input error (tidal volume, rate, apparatus dead space, units); VCO2 was measured, so CO2 production is not a cause
	// true physio: apparatus dead space: not given (must be configured for the circuit, 0 when there is none; never assumed zero)
}

func ExampleTidalVolumeForTarget() {
	r, _ := physio.TidalVolumeForTarget(420, 180, 55, 40, 70.566)
	fmt.Println(r.Basis())
	fmt.Println(r.Flags() == nil)
	rate, _ := physio.RateForTarget(14, 55, 40, 420, 70.566)
	fmt.Println(rate.Basis())
	// Output:
	// VT for target = VD + (VT - VD) x PaCO2 / target = 180 mL + (420 mL - 180 mL) x 55.0 mmHg / 40.0 mmHg = 510.0 mL (7.23 mL/kg PBW of 70.57 kg)
	// true
	// RR for target = RR x PaCO2 / target = 14.0 /min x 55.0 mmHg / 40.0 mmHg = 19.25 /min (VT 420 mL = 5.95 mL/kg PBW of 70.57 kg)
}

func ExampleRange_Check() {
	// A kPa value sent as mm[Hg] is refused with a reason, not clamped.
	err := physio.PaCO2Range.Check("PaCO2", 5.3)
	fmt.Println(err)
	fmt.Println(errors.Is(err, physio.ErrImplausible))
	// Output:
	// physio: PaCO2 5.3 mmHg: physiologically implausible (plausible 10 to 250 mmHg)
	// true
}

func ExampleAlveolarDeadSpaceFraction() {
	g, _ := physio.EndTidalGradient(45, 35)
	f, _ := physio.AlveolarDeadSpaceFraction(45, 35)
	fmt.Printf("%.1f %s [%s]; %.4f [%s] (%s)\n", g.Value, physio.DisplayUnit(g.Unit), g.Interpretation.Code, f.Value, f.Interpretation.Code, f.Interpretation.Source)
	// Output:
	// 10.0 mmHg [H]; 0.2222 [H] (Tyburski et al., J Trauma 2002;53:738)
}
