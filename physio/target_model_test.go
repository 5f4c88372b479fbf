package physio_test

import (
	"errors"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// TestForTargetBeyondModel: an answer outside the input ranges is refused
// with ErrBeyondModel, not flagged. Above 80 /min is high-frequency
// ventilation, where the bulk-flow alveolar ventilation equation does not
// hold [common practice, the reason of RespRateRange]; the ARDS Network
// protocol card allows a set rate up to 35 /min [published], which stays a
// flag. Values from the formulas of physiology.md s9 [derived].
func TestForTargetBeyondModel(t *testing.T) {
	for _, c := range []struct {
		name   string
		call   func() (physio.Result, error)
		refuse bool
	}{
		// 35 x 100 / 40 = 87.5 /min > 80.
		{"rate_87.5_per_min_refused", func() (physio.Result, error) { return physio.RateForTarget(35, 100, 40, 420, 70.566) }, true},
		// 30 x 100 / 40 = 75 /min: inside the model, flagged above 35.
		{"rate_75_per_min_flagged_not_refused", func() (physio.Result, error) { return physio.RateForTarget(30, 100, 40, 420, 70.566) }, false},
		// 300 + (1500 - 300) x 100 / 40 = 3300 mL > 2000.
		{"vt_3300_mL_refused", func() (physio.Result, error) { return physio.TidalVolumeForTarget(1500, 300, 100, 40, 70.566) }, true},
		// 180 + (420 - 180) x 55 / 40 = 510 mL.
		{"vt_510_mL_derived", func() (physio.Result, error) { return physio.TidalVolumeForTarget(420, 180, 55, 40, 70.566) }, false},
		// 20 x 30 / 100 = 6 /min: inside, flagged below 8.
		{"rate_6_per_min_flagged", func() (physio.Result, error) { return physio.RateForTarget(20, 30, 100, 420, 70.566) }, false},
		// 2.5 x 30 / 100 = 0.75 /min < 2.
		{"rate_0.75_per_min_refused", func() (physio.Result, error) { return physio.RateForTarget(2.5, 30, 100, 420, 70.566) }, true},
	} {
		t.Run(c.name, func(t *testing.T) {
			r, err := c.call()
			if c.refuse {
				if !errors.Is(err, physio.ErrBeyondModel) {
					t.Fatalf("got %v (%v), want ErrBeyondModel", r.Value, err)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
		})
	}
}
