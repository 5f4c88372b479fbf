package review

import (
	"context"
	"fmt"
	"image/color"
	"math"
	"slices"
	"sort"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	"github.com/ventderive/ventderive/consumer/postgres"
)

// ReasonBin is the number of refusals of one reason in one time bin.
type ReasonBin struct {
	Reason string
	Start  time.Time
	Count  int
}

// RefusalSeriesData is refusals per reason per bin of blood-gas time.
type RefusalSeriesData struct {
	Bin  time.Duration
	Bins []ReasonBin
}

// The bin is an hour when the refusals span at most three days, a day
// otherwise.
const refusalSeriesSQL = `
WITH r AS (
    SELECT reason, effective FROM review_refusal
    WHERE ($1 = '' OR patient_ref = $1)
      AND ($2::timestamptz IS NULL OR effective >= $2) AND ($3::timestamptz IS NULL OR effective < $3)
      AND ($4 = '' OR kind = $4) AND ($5 = '' OR reason = $5)),
span AS (SELECT CASE WHEN max(effective) - min(effective) <= interval '3 days' THEN interval '1 hour'
                     ELSE interval '1 day' END AS bin FROM r)
SELECT reason, date_bin(span.bin, effective, timestamptz '2000-01-01 00:00:00Z'), extract(epoch FROM span.bin)::bigint, count(*)
FROM r, span
GROUP BY 1, 2, 3
ORDER BY 1, 2`

// RefusalSeries counts refusals per reason per hour or day of blood-gas
// time, under f's patient, period, kind and reason.
func (s *Store) RefusalSeries(ctx context.Context, f postgres.Filter) (RefusalSeriesData, error) {
	rows, err := s.pool.Query(ctx, refusalSeriesSQL, f.Patient, optTime(f.From), optTime(f.To), f.Kind, f.Reason)
	if err != nil {
		return RefusalSeriesData{}, fmt.Errorf("refusals over time: %w", err)
	}
	var out RefusalSeriesData
	var b ReasonBin
	var secs int64
	_, err = pgx.ForEachRow(rows, []any{&b.Reason, &b.Start, &secs, &b.Count}, func() error {
		x := b
		x.Start = x.Start.UTC()
		out.Bins = append(out.Bins, x)
		out.Bin = time.Duration(secs) * time.Second
		return nil
	})
	if err != nil {
		return RefusalSeriesData{}, fmt.Errorf("refusals over time: %w", err)
	}
	return out, nil
}

// ReasonTotal counts dead letters of one reason.
type ReasonTotal struct {
	Reason      string
	Count       int
	First, Last time.Time
}

const deadLetterReasonsSQL = `
SELECT reason, count(*), min(created_at), max(created_at)
FROM review_dead_letter
WHERE ($1::timestamptz IS NULL OR created_at >= $1) AND ($2::timestamptz IS NULL OR created_at < $2)
  AND ($3 = '' OR reason = $3)
GROUP BY reason
ORDER BY count(*) DESC, reason`

// DeadLetterReasons counts dead letters by reason, by recording time.
func (s *Store) DeadLetterReasons(ctx context.Context, f postgres.Filter) ([]ReasonTotal, error) {
	rows, err := s.pool.Query(ctx, deadLetterReasonsSQL, optTime(f.From), optTime(f.To), f.Reason)
	if err != nil {
		return nil, fmt.Errorf("dead letters by reason: %w", err)
	}
	out, err := pgx.CollectRows(rows, func(row pgx.CollectableRow) (ReasonTotal, error) {
		var t ReasonTotal
		err := row.Scan(&t.Reason, &t.Count, &t.First, &t.Last)
		t.First, t.Last = t.First.UTC(), t.Last.UTC()
		return t, err
	})
	if err != nil {
		return nil, fmt.Errorf("dead letters by reason: %w", err)
	}
	return out, nil
}

var reasonGlyphs = []draw.GlyphDrawer{draw.CircleGlyph{}, draw.SquareGlyph{}, draw.TriangleGlyph{}, draw.CrossGlyph{},
	draw.RingGlyph{}, draw.PlusGlyph{}, draw.BoxGlyph{}, draw.PyramidGlyph{}}
var reasonColors = []color.Color{blue, orange, green, purple, red, black, grey}

// refusalFigure plots refusals per bin, one line per reason, each with its
// own glyph (colour is never the only carrier).
func refusalFigure(d RefusalSeriesData) (Figure, error) {
	const title = "Refusals by reason over time"
	if len(d.Bins) == 0 {
		return Figure{ID: "refusals", Title: title, Empty: true}, nil
	}
	byReason := map[string]plotter.XYs{}
	var lo, hi time.Time
	top := 0
	for _, b := range d.Bins {
		byReason[b.Reason] = append(byReason[b.Reason], plotter.XY{X: unix(b.Start), Y: float64(b.Count)})
		if lo.IsZero() || b.Start.Before(lo) {
			lo = b.Start
		}
		if b.Start.After(hi) {
			hi = b.Start
		}
		top = max(top, b.Count)
	}
	reasons := make([]string, 0, len(byReason))
	for r := range byReason {
		reasons = append(reasons, r)
	}
	sort.Strings(reasons)
	p := newPlot(Timeline{From: lo, To: hi.Add(d.Bin)}, title, "refusals per "+binName(d.Bin))
	p.X.Label.Text = "blood-gas time (UTC)"
	for i, r := range reasons {
		line, sc, err := plotter.NewLinePoints(byReason[r])
		if err != nil {
			return Figure{}, err
		}
		c := reasonColors[i%len(reasonColors)]
		sc.GlyphStyle = draw.GlyphStyle{Color: c, Radius: vg.Points(3), Shape: reasonGlyphs[i%len(reasonGlyphs)]}
		line.LineStyle.Color, line.LineStyle.Width = c, vg.Points(0.8)
		p.Add(line, sc)
		p.Legend.Add(r, line, sc)
	}
	p.Y.Min = 0
	p.Y.Max = math.Ceil(float64(top) * (1.3 + 0.12*float64(len(reasons))))
	p.Y.Tick.Marker = integerTicks{}
	return finish(p, "refusals", title, "Counted per "+binName(d.Bin)+" of blood-gas time; the tables below have the exact counts.", nil)
}

func binName(d time.Duration) string {
	if d == time.Hour {
		return "hour"
	}
	return "day"
}

// integerTicks marks whole counts only.
type integerTicks struct{}

func (integerTicks) Ticks(lo, hi float64) []plot.Tick {
	step := math.Max(1, math.Ceil((hi-lo)/6))
	var t []plot.Tick
	for v := math.Ceil(lo); v <= hi; v += step {
		t = append(t, plot.Tick{Value: v, Label: strconv.Itoa(int(v))})
	}
	return t
}

// shownNumber renders a value as the published notes do: at most 3
// decimals, no trailing zeros (postgres.Input.Shown does the same).
func shownNumber(v float64) string {
	r := math.Round(v*1000) / 1000
	if r == 0 {
		r = 0
	}
	return strconv.FormatFloat(r, 'f', -1, 64)
}

func sortMeasured(ps []Point) {
	slices.SortFunc(ps, func(a, b Point) int { return a.Effective.Compare(b.Effective) })
}
