package scenario

import (
	"fmt"
	"math"
	"testing"
	"time"
)

// gasReading is one arterial blood gas with the ventilator data of its
// pairing window averaged, recomputed from the messages alone.
type gasReading struct {
	effective time.Time
	paCO2     float64 // mm[Hg]
	ve        float64 // expired minute volume, L/min; NaN without data
	vco2      float64 // mL/min; NaN without data
	petCO2    float64 // mm[Hg]; NaN without data
	tempC     float64 // nearest temperature, Cel
}

// pT is the PaCO2 at the patient's temperature: the analyser's 37 Cel value
// x 10^(0.019 x (T - 37)) (in vitro coefficient, J Appl Physiol, submitted
// 1964 [published]), as the service corrects it for the gas-phase formulas.
func (g gasReading) pT() float64 { return g.paCO2 * math.Pow(10, 0.019*(g.tempC-37)) }

// vdvt is the Enghoff dead-space fraction from VCO2 and VE:
// 1 - K(T) VCO2 / (VE PaCO2(T)), K(T) = 0.760 (273 + T) / 273 [derived,
// reference/physiology.md s1 and s2].
func (g gasReading) vdvt() float64 {
	return 1 - 0.760*(273+g.tempC)/273*g.vco2/(g.ve*g.pT())
}

// vr is the ventilatory ratio, VE[mL/min] PaCO2 / (PBW 100 37.5)
// [published: Sinha et al., Br J Anaesth 2009; reference/physiology.md s6],
// with the PaCO2 at body temperature.
func (g gasReading) vr(pbwKg float64) float64 { return g.ve * 1000 * g.pT() / (pbwKg * 100 * 37.5) }

// pbw is the ARDS Network predicted body weight, kg [published: NEJM 2000;
// reference/physiology.md s5].
func pbw(male bool, heightCm float64) float64 {
	if male {
		return 50 + 0.91*(heightCm-152.4)
	}
	return 45.5 + 0.91*(heightCm-152.4)
}

// readings recomputes, for one patient, every current arterial blood gas
// (latest version, not entered in error) with its window's data.
func readings(p parsed, ref string) []gasReading {
	latest := map[string]value{}
	for _, v := range p.values {
		if v.patient != ref || !v.has(sysLOINC, "2019-8") {
			continue
		}
		if cur, ok := latest[v.id]; !ok || v.version > cur.version {
			latest[v.id] = v
		}
	}
	var out []gasReading
	for _, g := range latest {
		if g.status == "entered-in-error" {
			continue
		}
		r := gasReading{effective: g.effective, paCO2: canonical(g)}
		var ve, vco2, pet []float64
		bestTemp := time.Duration(math.MaxInt64)
		for _, v := range p.values {
			if v.patient != ref {
				continue
			}
			if v.has(sysLOINC, "8310-5") {
				if d := v.effective.Sub(g.effective).Abs(); d < bestTemp {
					bestTemp, r.tempC = d, canonical(v)
				}
			}
			if v.effective.Before(g.effective.Add(-PairingBefore)) || v.effective.After(g.effective.Add(PairingAfter)) {
				continue
			}
			switch {
			case v.has(sysLOINC, "76008-2"):
				ve = append(ve, v.num)
			case v.has(sysLOINC, "60825-7"):
				vco2 = append(vco2, v.num)
			case v.has(sysLOINC, "19891-1") || v.has(sysMDC, "151708"):
				pet = append(pet, canonical(v))
			}
		}
		r.ve, r.vco2, r.petCO2 = mean(ve), mean(vco2), mean(pet)
		out = append(out, r)
	}
	// In time order.
	for i := 1; i < len(out); i++ {
		for j := i; j > 0 && out[j].effective.Before(out[j-1].effective); j-- {
			out[j], out[j-1] = out[j-1], out[j]
		}
	}
	return out
}

func mean(xs []float64) float64 {
	if len(xs) == 0 {
		return math.NaN()
	}
	s := 0.0
	for _, x := range xs {
		s += x
	}
	return s / float64(len(xs))
}

func between(x, lo, hi float64) bool { return x >= lo && x <= hi }

// TestStoryPhysiology recomputes each story's defining values from the
// generated messages with the published formulas, for several seeds, and
// checks that a clinician would see what the story says.
func TestStoryPhysiology(t *testing.T) {
	type check func(t *testing.T, gs []gasReading, pbwKg float64)
	tests := []struct {
		bed   int
		name  string
		check check
	}{
		{1, "post-op_VDVT_0.25-0.40_VR_0.75-1.25_gradient_2-8mmHg", func(t *testing.T, gs []gasReading, pbwKg float64) {
			// Normal VD/VT about 0.3 [published: Nunn & Hill 1960]; VR near 1 in
			// healthy lungs [published: Sinha 2009]; gradient 4.6 +/- 2.5 mm[Hg]
			// [published: Nunn & Hill 1960].
			for _, g := range gs {
				if !between(g.vdvt(), 0.25, 0.40) || !between(g.vr(pbwKg), 0.75, 1.25) || !between(g.pT()-g.petCO2, 2, 8) {
					t.Errorf("%v: VD/VT %.3f VR %.2f gradient %.1f", g.effective, g.vdvt(), g.vr(pbwKg), g.pT()-g.petCO2)
				}
			}
		}},
		{2, "ARDS_VDVT_0.50-0.62_rising_to_0.64-0.76_VR_rising_above_2", func(t *testing.T, gs []gasReading, pbwKg float64) {
			// ARDS onset VD/VT 0.58 +/- 0.09 [published: Nuckton 2002]; VR median
			// about 2 in ARDS [published: PETAL-ROSE secondary analysis 2022].
			first, last := gs[0], gs[len(gs)-1]
			if !between(first.vdvt(), 0.50, 0.62) || !between(last.vdvt(), 0.64, 0.76) {
				t.Errorf("VD/VT %.3f -> %.3f", first.vdvt(), last.vdvt())
			}
			if !(last.vr(pbwKg) > first.vr(pbwKg)) || last.vr(pbwKg) < 2 {
				t.Errorf("VR %.2f -> %.2f", first.vr(pbwKg), last.vr(pbwKg))
			}
		}},
		{3, "COPD_PaCO2_above_50mmHg_gradient_above_10mmHg_falls_with_rate", func(t *testing.T, gs []gasReading, _ float64) {
			first, last := gs[0], gs[len(gs)-1]
			if first.paCO2 < 50 || first.pT()-first.petCO2 < 10 {
				t.Errorf("first PaCO2 %.1f gradient %.1f", first.paCO2, first.pT()-first.petCO2)
			}
			// PaCO2 is inversely proportional to alveolar ventilation
			// [derived, reference/physiology.md s9]: rate 14 -> 16 lowers it by 1/8.
			if got := last.paCO2 / first.paCO2; !between(got, 0.80, 0.94) {
				t.Errorf("PaCO2 ratio last/first %.3f, want about 14/16", got)
			}
			if !math.IsNaN(first.vco2) {
				t.Error("VCO2 sent although the story says it is not measured")
			}
		}},
		{4, "PE_gradient_above_13_then_below_10mmHg_VDVT_falls", func(t *testing.T, gs []gasReading, _ float64) {
			// Trauma survival best with gradient <= 9 mm[Hg] [published: Tyburski 2002].
			first, last := gs[0], gs[len(gs)-1]
			if first.pT()-first.petCO2 < 13 || last.pT()-last.petCO2 > 10 {
				t.Errorf("gradient %.1f -> %.1f", first.pT()-first.petCO2, last.pT()-last.petCO2)
			}
			if !(first.vdvt() >= 0.50 && last.vdvt() <= 0.46) {
				t.Errorf("VD/VT %.3f -> %.3f", first.vdvt(), last.vdvt())
			}
		}},
		{5, "sepsis_VCO2_above_270_VR_above_1.7_VDVT_below_0.46", func(t *testing.T, gs []gasReading, pbwKg float64) {
			for _, g := range gs {
				if g.vco2 < 270 || g.vr(pbwKg) < 1.7 || g.vdvt() > 0.46 || g.tempC < 38 {
					t.Errorf("%v: VCO2 %.0f VR %.2f VD/VT %.3f temp %.1f", g.effective, g.vco2, g.vr(pbwKg), g.vdvt(), g.tempC)
				}
			}
		}},
		{6, "cooled_33-34Cel_VCO2_below_150_then_rewarmed_above_170", func(t *testing.T, gs []gasReading, _ float64) {
			first, last := gs[0], gs[len(gs)-1]
			if !between(first.tempC, 33, 34) || first.vco2 > 150 || !between(first.paCO2, 35, 45) {
				t.Errorf("first: temp %.1f VCO2 %.0f PaCO2 %.1f", first.tempC, first.vco2, first.paCO2)
			}
			if last.tempC < 36 || last.vco2 < 170 {
				t.Errorf("last: temp %.1f VCO2 %.0f", last.tempC, last.vco2)
			}
		}},
		{9, "amended_VDVT_from_final_values_0.30-0.50", func(t *testing.T, gs []gasReading, _ float64) {
			for _, g := range gs {
				if !math.IsNaN(g.vco2) {
					t.Fatal("VCO2 sent although the story says it is not measured")
				}
				// With the amended value the gas is consistent with the story's
				// VE and VCO2 230: PaCO2 within 10 % of 0.863 x 230 / (VE x 0.6).
				want := 0.863 * 230 / (g.ve * 0.6)
				if math.Abs(g.paCO2-want) > 0.1*want {
					t.Errorf("%v: PaCO2 %.1f, story %.1f", g.effective, g.paCO2, want)
				}
			}
		}},
		{10, "entered_in_error_remaining_VDVT_0.38-0.52", func(t *testing.T, gs []gasReading, _ float64) {
			for _, g := range gs {
				if !between(g.vdvt(), 0.38, 0.52) {
					t.Errorf("%v: VD/VT %.3f", g.effective, g.vdvt())
				}
			}
		}},
	}
	for _, o := range []Options{{Seed: 1}, {Seed: 2, Duration: 12 * time.Hour, VentEvery: 2 * time.Minute}, {Seed: 3, Duration: MinDuration}} {
		sc, p := generated(t, o)
		for _, tt := range tests {
			t.Run(fmt.Sprintf("seed%d_%s/bed%d_%s", o.Seed, o.Duration, tt.bed, tt.name), func(t *testing.T) {
				pt := bedOf(t, sc, tt.bed)
				fp := p.patients[pt.Ref]
				var height float64
				for _, v := range p.values {
					if v.patient == pt.Ref && v.has(sysLOINC, "8302-2") {
						height = canonical(v)
					}
				}
				gs := readings(p, pt.Ref)
				if len(gs) < 2 || height == 0 {
					t.Fatalf("%d arterial gases, height %g", len(gs), height)
				}
				tt.check(t, gs, pbw(fp.Gender.Code() == "male", height))
			})
		}
	}
}
