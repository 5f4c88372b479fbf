package physio_test

import (
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// derivations are the package's derivations on the reference vector
// (reference §11), one closure each, for the benchmarks and the
// allocation test.
var derivations = []struct {
	name string
	run  func() (physio.Result, error)
}{
	{"PaCO2FromAlveolarVentilation", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(200, 4.2, 37) }},
	{"PaCO2FromAlveolarVentilationKPa", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilationKPa(200, 4.2, 37) }},
	{"AlveolarVentilationFromPaCO2", func() (physio.Result, error) { return physio.AlveolarVentilationFromPaCO2(200, 40, 0) }},
	{"AlveolarVentilationFromPaCO2KPa", func() (physio.Result, error) {
		return physio.AlveolarVentilationFromPaCO2KPa(200, 5.3329, 37)
	}},
	{"DeadSpaceEnghoff", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(40, 27) }},
	{"MixedExpiredPCO2", func() (physio.Result, error) { return physio.MixedExpiredPCO2(200, 10, 37) }},
	{"DeadSpaceFromVCO2", func() (physio.Result, error) { return physio.DeadSpaceFromVCO2(45, 200, 10, 37) }},
	{"DeadSpaceEstimated", func() (physio.Result, error) { return physio.DeadSpaceEstimated(45, 10, man) }},
	{"RestingEnergy", func() (physio.Result, error) { return physio.RestingEnergy(man) }},
	{"EstimateVCO2", func() (physio.Result, error) { return physio.EstimateVCO2(man) }},
	{"DeadSpaceVolume", func() (physio.Result, error) { return physio.DeadSpaceVolume(0.325, 500) }},
	{"AlveolarVentilationFromDeadSpace", func() (physio.Result, error) {
		return physio.AlveolarVentilationFromDeadSpace(10, 0.61644)
	}},
	{"PredictedBodyWeight", func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.Female, 163) }},
	{"PredictedPaCO2", func() (physio.Result, error) {
		return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VCO2Estimated: true, VT: 420, RR: 20, PBW: 70.566, ApparatusVD: 120, ApparatusVDKnown: true})
	}},
	{"PredictedPaCO2ArtificialAirwayAt33.5Cel", func() (physio.Result, error) {
		return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 140, VT: 520, RR: 10, PBW: 76.94, ApparatusVD: 50, ApparatusVDKnown: true,
			Anatomic: physio.AnatomicArtificialAirway, BodyTemp: 33.5})
	}},
	{"PaCO2AtBodyTemp", func() (physio.Result, error) { return physio.PaCO2AtBodyTemp(45, 33.5) }},
	{"PaCO2Discrepancy", func() (physio.Result, error) { return physio.PaCO2Discrepancy(57, 41.1, physio.VCO2Measured) }},
	{"VentilatoryRatio", func() (physio.Result, error) { return physio.VentilatoryRatio(10, 45, 70.566) }},
	{"EndTidalGradient", func() (physio.Result, error) { return physio.EndTidalGradient(35, 38) }},
	{"AlveolarDeadSpaceFraction", func() (physio.Result, error) { return physio.AlveolarDeadSpaceFraction(45, 35) }},
	{"RateForTarget", func() (physio.Result, error) { return physio.RateForTarget(20, 70, 35, 635, 70.566) }},
	{"TidalVolumeForTarget", func() (physio.Result, error) { return physio.TidalVolumeForTarget(600, 200, 60, 40, 70.566) }},
}

var sink physio.Result

// Derivations allocate nothing on success: the Result stores its
// constants, assumptions, flags and basis operands in fixed arrays.
func TestDerivationsDoNotAllocate(t *testing.T) {
	for _, d := range derivations {
		t.Run(d.name, func(t *testing.T) {
			if _, err := d.run(); err != nil {
				t.Fatal(err)
			}
			allocs := testing.AllocsPerRun(200, func() {
				r, err := d.run()
				if err != nil {
					panic(err)
				}
				sink = r
			})
			if allocs != 0 {
				t.Errorf("%v allocations per run, want 0", allocs)
			}
		})
	}
}

func BenchmarkDerivations(b *testing.B) {
	for _, d := range derivations {
		b.Run(d.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				r, err := d.run()
				if err != nil {
					b.Fatal(err)
				}
				sink = r
			}
		})
	}
}

// BenchmarkBasis measures rendering the basis line, which allocates and is
// done once per stored derivation, off the derivation path.
func BenchmarkBasis(b *testing.B) {
	r, err := physio.DeadSpaceEstimated(45, 10, man)
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	for b.Loop() {
		if r.Basis() == "" {
			b.Fatal("empty basis")
		}
	}
}
