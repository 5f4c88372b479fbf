package review

import (
	"bytes"
	"encoding/base64"
	"fmt"
	"html/template"
	"image/color"
	"math"
	"strings"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// Plot sizes in points; the page shows an SVG point as a CSS pixel, so the
// image map's coordinates are the canvas coordinates (y flipped).
const (
	plotWidth  = 760
	plotHeight = 250
	hitRadius  = 6 // CSS px around a point that opens it
)

// series is one plotted series: its points, glyph and legend text.
type series struct {
	id     string // short code, the data-series attribute of its areas
	label  string
	points []Point
	shape  draw.GlyphDrawer
	color  color.Color
	dashed bool // the connecting line, for series that must look distinct (the estimate)
}

// refLine is a published threshold drawn across a plot.
type refLine struct {
	value float64
	label string // value and source, for the legend
}

// Area is one clickable point of a plot (an HTML image-map area).
type Area struct {
	X, Y   int
	Href   string
	Title  string // value, time, version and status, shown on hover
	Alt    string // the value as published
	Series string
}

// Figure is a rendered plot: the SVG as a data URL, its size and its
// clickable points.
type Figure struct {
	ID      string
	Title   string
	Caption string
	SVG     template.URL // data:image/svg+xml;base64,...
	Width   int
	Height  int
	Areas   []Area
	Empty   bool
	SVGSize int      // bytes of the SVG itself
	Refs    []string // the reference lines with their sources, as text beside the image
}

var (
	black  = color.RGBA{A: 255}
	blue   = color.RGBA{R: 0x1f, G: 0x5f, B: 0xa8, A: 255}
	orange = color.RGBA{R: 0xc0, G: 0x5a, B: 0x00, A: 255}
	green  = color.RGBA{R: 0x2b, G: 0x7a, B: 0x3d, A: 255}
	purple = color.RGBA{R: 0x6b, G: 0x3f, B: 0x99, A: 255}
	grey   = color.RGBA{R: 0x66, G: 0x66, B: 0x66, A: 255}
	red    = color.RGBA{R: 0xb0, G: 0x1c, B: 0x1c, A: 255}
)

// figureSpec says what one timeline plot shows.
type figureSpec struct {
	id, title, yLabel string
	series            []series
	refs              []refLine
	caption           string
}

// refLines are the published thresholds of each plotted kind, with the
// source the physio package cites for the reading on each side. The values
// are checked against physio's interpretations in plots_test.go: a line
// here and the reading in the published note never disagree.
func refLines(kind string) []refLine {
	switch kind {
	case "deadspace":
		return []refLine{
			{0.30, "0.30: upper normal VD/VT, measured methods only (" + physio.InterpretDeadSpaceFraction(0.25).Source + ")"},
			{0.58, "0.58: mean VD/VT at ARDS onset, measured methods only (" + lastSource(physio.InterpretDeadSpaceFraction(0.6).Source) + ")"},
		}
	case fhirmap.KindPaCO2PETCO2Gradient:
		return []refLine{{9, "9 mmHg (" + firstSource(physio.InterpretEndTidalGradient(10).Source) + ")"}}
	case fhirmap.KindAlveolarDeadSpace:
		return []refLine{{0.20, "0.20 (" + physio.InterpretAlveolarDeadSpaceFraction(0.3).Source + ")"}}
	case fhirmap.KindVentilatoryRatio:
		return []refLine{
			{1.55, "1.55: mean of non-survivors, a group value (" + physio.InterpretVentilatoryRatio(1.6).Source + ")"},
			{2.0, "2.0: median in ARDS trials, a group value (" + firstSource(physio.InterpretVentilatoryRatio(2.1).Source) + ")"},
		}
	}
	return nil
}

func firstSource(s string) string { a, _, _ := strings.Cut(s, "; "); return a }
func lastSource(s string) string {
	if i := strings.LastIndex(s, "; "); i >= 0 {
		return s[i+2:]
	}
	return s
}

// figures builds the timeline's plots, in page order.
func figures(tl Timeline, link func(key string) string, open func(p Point) string) ([]Figure, error) {
	byKind := map[string][]Point{}
	for _, p := range tl.Points {
		byKind[p.Kind] = append(byKind[p.Kind], p)
	}
	specs := []figureSpec{
		{id: "paco2", title: "PaCO2: measured (blood gas) and predicted", yLabel: "PaCO2 (mmHg)",
			series: []series{
				{id: "measured", label: "measured PaCO2 (arterial blood gas)", points: tl.Measured, shape: draw.CircleGlyph{}, color: black},
				{id: "predicted", label: "predicted PaCO2 (derived)", points: byKind[fhirmap.KindPredictedPaCO2], shape: draw.TriangleGlyph{}, color: blue},
			},
			caption: "A measured point opens the derived value it fed (measured minus predicted where derived); a predicted point opens its value."},
		{id: "deadspace", title: "Dead-space fraction VD/VT by method", yLabel: "VD/VT",
			series: []series{
				{id: "enghoff", label: "Bohr-Enghoff, measured mixed-expired PCO2", points: byKind[fhirmap.KindDeadSpaceEnghoff], shape: draw.SquareGlyph{}, color: blue},
				{id: "vco2", label: "Enghoff with measured VCO2 and VE", points: byKind[fhirmap.KindDeadSpaceVCO2], shape: draw.CircleGlyph{}, color: green},
				{id: "estimate", label: "ESTIMATE (VCO2 from an energy equation; no threshold applies)", points: byKind[fhirmap.KindDeadSpaceEstimated], shape: draw.RingGlyph{}, color: orange, dashed: true},
			},
			refs:    refLines("deadspace"),
			caption: "Filled glyphs: measured methods. Hollow rings on a dashed line: the estimate, which the thresholds do not apply to."},
		{id: "gradient", title: "Arterial to end-tidal PCO2 gradient (Pa-ETCO2)", yLabel: "Pa-ETCO2 (mmHg)",
			series: []series{{id: "gradient", label: "Pa-ETCO2", points: byKind[fhirmap.KindPaCO2PETCO2Gradient], shape: draw.CircleGlyph{}, color: purple}},
			refs:   refLines(fhirmap.KindPaCO2PETCO2Gradient)},
		{id: "avdsf", title: "Alveolar dead-space fraction", yLabel: "AVDSF",
			series: []series{{id: "avdsf", label: "alveolar dead-space fraction", points: byKind[fhirmap.KindAlveolarDeadSpace], shape: draw.CircleGlyph{}, color: green}},
			refs:   refLines(fhirmap.KindAlveolarDeadSpace)},
		{id: "vr", title: "Ventilatory ratio (Sinha)", yLabel: "VR",
			series: []series{{id: "vr", label: "ventilatory ratio", points: byKind[fhirmap.KindVentilatoryRatio], shape: draw.CircleGlyph{}, color: blue}},
			refs:   refLines(fhirmap.KindVentilatoryRatio)},
	}
	var out []Figure
	for _, s := range specs {
		f, err := s.render(tl, open)
		if err != nil {
			return nil, fmt.Errorf("plot %s: %w", s.id, err)
		}
		out = append(out, f)
	}
	f, err := marksFigure(tl, link)
	if err != nil {
		return nil, err
	}
	out = append(out, f)
	for _, q := range VentQuantities {
		f, err := ventFigure(tl, q)
		if err != nil {
			return nil, err
		}
		out = append(out, f)
	}
	return out, nil
}

func newPlot(tl Timeline, title, yLabel string) *plot.Plot {
	p := plot.New()
	p.Title.Text = title
	p.Y.Label.Text = yLabel
	p.X.Label.Text = "blood-gas time (UTC)"
	p.X.Min, p.X.Max = unix(tl.From), unix(tl.To)
	format := "Jan 2 15:04"
	p.X.Tick.Marker = plot.TimeTicks{Format: format, Time: func(t float64) time.Time { return time.Unix(int64(t), 0).UTC() }}
	p.Legend.Top, p.Legend.Left = true, true
	p.Add(plotter.NewGrid())
	return p
}

func unix(t time.Time) float64 { return float64(t.Unix()) }

// manyPoints is the number of points of a series beyond which its glyphs
// are not drawn (the line is, and every point stays clickable): glyphs of
// a month of blood gases would outweigh the page budget.
const manyPoints = 150

func (s figureSpec) render(tl Timeline, open func(Point) string) (Figure, error) {
	p := newPlot(tl, s.title, s.yLabel)
	lo, hi := math.Inf(1), math.Inf(-1)
	var areas []pendingArea
	n := 0
	for _, sr := range s.series {
		if len(sr.points) == 0 {
			continue
		}
		n += len(sr.points)
		xys := make(plotter.XYs, len(sr.points))
		for i, pt := range sr.points {
			xys[i] = plotter.XY{X: unix(pt.Effective), Y: pt.Value}
			lo, hi = min(lo, pt.Value), max(hi, pt.Value)
			title := fmt.Sprintf("%s %s at %s (v%d %s)", pt.Published, pt.DisplayUnit,
				pt.Effective.Format("2006-01-02 15:04"), pt.Version, pt.Status)
			areas = append(areas, pendingArea{x: xys[i].X, y: xys[i].Y, href: open(pt), title: title, alt: pt.Published, series: sr.id})
		}
		line, sc, err := plotter.NewLinePoints(xys)
		if err != nil {
			return Figure{}, err
		}
		sc.GlyphStyle = draw.GlyphStyle{Color: sr.color, Radius: vg.Points(3.5), Shape: sr.shape}
		line.LineStyle.Color, line.LineStyle.Width = sr.color, vg.Points(0.8)
		if sr.dashed {
			line.LineStyle.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
		}
		if len(sr.points) > manyPoints {
			p.Add(line)
			p.Legend.Add(fmt.Sprintf("%s (%d)", sr.label, len(sr.points)), line)
		} else {
			p.Add(line, sc)
			p.Legend.Add(fmt.Sprintf("%s (%d)", sr.label, len(sr.points)), line, sc)
		}
	}
	if n == 0 {
		return Figure{ID: s.id, Title: s.title, Empty: true, Caption: s.caption}, nil
	}
	for i, r := range s.refs {
		fn := plotter.NewFunction(func(float64) float64 { return r.value })
		fn.LineStyle.Color, fn.LineStyle.Width = grey, vg.Points(1)
		fn.LineStyle.Dashes = [][]vg.Length{{vg.Points(6), vg.Points(2)}, {vg.Points(2), vg.Points(2)}}[i%2]
		p.Add(fn)
		p.Legend.Add("reference "+r.label, fn)
		lo, hi = min(lo, r.value), max(hi, r.value)
	}
	// Headroom above the data for the legend.
	span := hi - lo
	if span == 0 {
		span = math.Abs(hi)*0.2 + 1
	}
	p.Y.Min, p.Y.Max = lo-0.1*span, hi+span*(0.25+0.14*float64(legendEntries(s)))
	f, err := finish(p, s.id, s.title, s.caption, areas)
	for _, r := range s.refs {
		f.Refs = append(f.Refs, r.label)
	}
	return f, err
}

func legendEntries(s figureSpec) int {
	n := len(s.refs)
	for _, sr := range s.series {
		if len(sr.points) > 0 {
			n++
		}
	}
	return n
}

type pendingArea struct {
	x, y             float64
	href, title, alt string
	series           string
}

// finish draws p to SVG and maps every pending area to image coordinates.
func finish(p *plot.Plot, id, title, caption string, pending []pendingArea) (Figure, error) {
	c := vgsvg.New(vg.Points(plotWidth), vg.Points(plotHeight))
	dc := draw.New(c)
	p.Draw(dc)
	da := p.DataCanvas(dc)
	tx, ty := p.Transforms(&da)
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return Figure{}, err
	}
	f := Figure{ID: id, Title: title, Caption: caption, Width: plotWidth, Height: plotHeight, SVGSize: buf.Len(),
		SVG: template.URL("data:image/svg+xml;base64," + base64.StdEncoding.EncodeToString(buf.Bytes()))}
	for _, a := range pending {
		x, y := tx(a.x).Points(), plotHeight-ty(a.y).Points()
		f.Areas = append(f.Areas, Area{X: int(math.Round(x)), Y: int(math.Round(y)), Href: a.href, Title: a.title, Alt: a.alt, Series: a.series})
	}
	return f, nil
}

// marksFigure puts refusals and retractions on the time axis, one row per
// kind of event, each mark opening its key's history.
func marksFigure(tl Timeline, link func(string) string) (Figure, error) {
	const title = "Refusals and retractions"
	if len(tl.Marks) == 0 {
		return Figure{ID: "marks", Title: title, Empty: true}, nil
	}
	p := newPlot(tl, title, "")
	p.Y.Min, p.Y.Max = 0, 3.2
	p.Y.Tick.Marker = plot.ConstantTicks([]plot.Tick{{Value: 1, Label: "refused"}, {Value: 2, Label: "retracted"}})
	var pending []pendingArea
	rows := []struct {
		what  string
		y     float64
		shape draw.GlyphDrawer
		color color.Color
	}{{"refused", 1, draw.CrossGlyph{}, red}, {"retracted", 2, draw.PyramidGlyph{}, black}}
	for _, r := range rows {
		var xys plotter.XYs
		for _, m := range tl.Marks {
			if m.What != r.what {
				continue
			}
			xys = append(xys, plotter.XY{X: unix(m.Effective), Y: r.y})
			why := m.Reason
			pending = append(pending, pendingArea{x: unix(m.Effective), y: r.y, href: link(m.Key), series: r.what, alt: r.what,
				title: fmt.Sprintf("%s %s at %s: %s", m.Kind, r.what, m.Effective.Format("2006-01-02 15:04"), why)})
		}
		if len(xys) == 0 {
			continue
		}
		sc, err := plotter.NewScatter(xys)
		if err != nil {
			return Figure{}, err
		}
		sc.GlyphStyle = draw.GlyphStyle{Color: r.color, Radius: vg.Points(4), Shape: r.shape}
		p.Add(sc)
		p.Legend.Add(fmt.Sprintf("%s (%d)", r.what, len(xys)), sc)
	}
	return finish(p, "marks", title, "A cross is a refusal (reason on hover), a pyramid a retraction; each opens its history.", pending)
}

// ventFigure plots one ventilator input as sampled (not clickable: an
// input, not a derived value; the value pages list the exact readings
// used).
func ventFigure(tl Timeline, quantity string) (Figure, error) {
	unit := fhirmap.Quantity(quantity).Unit()
	shown := physio.DisplayUnit(unit)
	title := ventTitles[quantity]
	id := "vent-" + quantity
	var xys plotter.XYs
	for _, b := range tl.Vent {
		if b.Quantity == quantity {
			xys = append(xys, plotter.XY{X: unix(b.Effective), Y: b.Value})
		}
	}
	caption := fmt.Sprintf("The first reading sent in each %s (a sample, not a mean).", spanText(tl.Bucket))
	if len(xys) == 0 {
		return Figure{ID: id, Title: title, Empty: true, Caption: caption}, nil
	}
	p := newPlot(tl, title, fmt.Sprintf("%s (%s)", title, shown))
	p.X.Label.Text = "time (UTC)"
	ymin, ymax := math.Inf(1), math.Inf(-1)
	for _, xy := range xys {
		ymin, ymax = min(ymin, xy.Y), max(ymax, xy.Y)
	}
	l, err := plotter.NewLine(xys)
	if err != nil {
		return Figure{}, err
	}
	l.LineStyle.Color, l.LineStyle.Width = blue, vg.Points(1)
	p.Add(l)
	p.Legend.Add(fmt.Sprintf("reading, one per %s (%d)", spanText(tl.Bucket), len(xys)), l)
	span := ymax - ymin
	if span == 0 {
		span = math.Abs(ymax)*0.2 + 1
	}
	p.Y.Min, p.Y.Max = ymin-0.1*span, ymax+0.4*span
	return finish(p, id, title, caption, nil)
}

var ventTitles = map[string]string{
	string(fhirmap.QTidalVol):  "Tidal volume VT",
	string(fhirmap.QRespRate):  "Respiratory rate",
	string(fhirmap.QMinuteVol): "Minute volume VE",
	string(fhirmap.QVCO2):      "CO2 production VCO2",
	string(fhirmap.QPETCO2):    "End-tidal PCO2 PETCO2",
}
