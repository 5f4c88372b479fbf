package main

import (
	"context"
	"fmt"
	"runtime"
	"slices"
	"strings"
	"sync/atomic"
	"text/tabwriter"

	"github.com/ventderive/ventderive/fhirmap"
)

// The cost ladder adds the pipeline's costs to the floor one step at a
// time, in the same run as the floor and the pipeline, each step as its
// own row:
//
//  1. the floor (JetStream pull, one multi-row insert of the raw messages
//     per group of up to 64, ack after COMMIT);
//  2. the floor plus the service's strict decode and fact extraction
//     (fhirmap.Decode, as the pipeline calls it and where: one message
//     after another as a pull's messages are dealt to the lanes) of every
//     message, storing only the floor's row;
//  3. the service itself (consumer.Pipeline over postgres.Store) on the
//     run's inputs that can affect no derivation: the inbox row with its
//     zstd payload and the fact rows, through the group's cold path (no
//     blood gas is stored, so no patient is hot), no derivation;
//  4. the full pipeline with one replica (the pipeline row of the run).
//
// Each step keeps the work of the steps before it, so the ratio to the
// floor of step k is the best the pipeline could reach while doing that
// work: ladderConclusion says which step costs most and from which step
// on the target is out of reach.

// ladderStep is one measured step of the ladder.
type ladderStep struct {
	name string // the row label
	// keeps is what the step adds that the service guarantees, for the
	// conclusion ("cannot be met without dropping <keeps>").
	keeps                   string
	inputs                  int
	perSec, cpuUS, serverUS float64
	facts                   float64 // facts decoded (step 2) or stored (3, 4) per input
	outputs                 int     // derived Observations and Provenance in the outbox
}

func (s ladderStep) wallUS() float64 { return 1e6 / s.perSec }

const (
	ladderFloor  = "1 floor"
	ladderDecode = "2 + strict decode and facts"
	ladderCheap  = "3 + inbox and fact rows (cheap path)"
	ladderFull   = "4 full pipeline, one replica"
)

// ladderCodes is the code table the pipeline decodes with (consumer.New):
// the default codes under the site's CodeSystem URL.
func (b *bench) ladderCodes() *fhirmap.CodeTable {
	codes := fhirmap.DefaultCodes()
	if b.site.CodeSystemURL != "" {
		codes = codes.WithCodeSystemURL(b.site.CodeSystemURL)
	}
	return codes
}

// ladderDecode is step 2: the floor's drain of the run's messages with the
// service's strict decode of each message where the pipeline decodes it:
// in as many decoders as lanes, each message dealt to its lane in arrival
// order once decoded.
func (b *bench) ladderDecode(ctx context.Context) (ladderStep, error) {
	var step ladderStep
	if err := b.resetStreams(ctx); err != nil {
		return step, err
	}
	if err := b.publishAll(ctx, b.msgs); err != nil {
		return step, err
	}
	_, pool, err := b.newDatabase(ctx)
	if err != nil {
		return step, err
	}
	defer pool.Close()
	if _, err := pool.Exec(ctx, floorTableSQL); err != nil {
		return step, err
	}
	codes := b.ladderCodes()
	var facts atomic.Int64
	decode := func(raw []byte) {
		// A message that does not decode is still stored, as the floor
		// stores it (the pipeline would dead-letter it).
		if d, err := fhirmap.Decode(raw, codes); err == nil {
			facts.Add(int64(len(d.Facts)))
		}
	}
	runtime.GC()
	from := b.takeUsage(true)
	if _, err := b.floorConsumeWork(ctx, "bench-ladder-decode", pool, nil, decode); err != nil {
		return step, err
	}
	var r benchRow
	r.fill(from, b.takeUsage(false), len(b.msgs))
	step = stepOf(r, ladderDecode, "the strict decode")
	step.facts = float64(facts.Load()) / float64(len(b.msgs))
	return step, nil
}

// readingQuantities are the quantities of a message that can affect no
// derivation while no blood gas is stored: none is a blood gas or a
// patient-level quantity (which make a patient hot in the group's
// hot-patients query whatever is stored). An allow-list: a quantity added
// to the decoder later is left out of the cheap step, not wrongly put in.
var readingQuantities = []fhirmap.Quantity{fhirmap.QPETCO2, fhirmap.QVCO2, fhirmap.QMinuteVol, fhirmap.QTidalVol,
	fhirmap.QRespRate, fhirmap.QFiO2, fhirmap.QPEEP, fhirmap.QPlateau, fhirmap.QMeanAirway, fhirmap.QPECO2, fhirmap.QFETCO2}

// cheapMessages are the messages of msgs that decode to at least one fact,
// every one a reading quantity: published without the others, none can
// affect a blood gas, so each takes the group's cold path.
func cheapMessages(msgs []benchMsg, codes *fhirmap.CodeTable) []benchMsg {
	var out []benchMsg
	for _, m := range msgs {
		d, err := fhirmap.Decode(m.payload, codes)
		if err != nil || len(d.Facts) == 0 {
			continue
		}
		if !slices.ContainsFunc(d.Facts, func(f fhirmap.Fact) bool { return !slices.Contains(readingQuantities, f.Quantity) }) {
			out = append(out, m)
		}
	}
	return out
}

// ladderCheap is step 3: one replica of the real pipeline draining the
// run's cheap messages (cheapMessages) into a fresh store. It checks that
// nothing was derived (no blood gas, so no derivation is possible).
func (b *bench) ladderCheap(ctx context.Context) (ladderStep, error) {
	msgs := cheapMessages(b.msgs, b.ladderCodes())
	if len(msgs) == 0 {
		return ladderStep{}, fmt.Errorf("none of the %d inputs is a reading without blood gas", len(b.msgs))
	}
	var r benchRow
	pool, err := b.pipelineDrain(ctx, msgs, 1, &r)
	if err != nil {
		return ladderStep{}, err
	}
	defer pool.Close()
	step := stepOf(r, ladderCheap, "the inbox row (dedup, the payload kept) or the fact rows")
	var derived int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM derivation`).Scan(&derived); err != nil {
		return step, err
	}
	if derived != 0 || step.outputs != 0 || r.facts == 0 {
		return step, fmt.Errorf("the cheap step stored %d facts and derived %d values (%d outputs) from readings without blood gas", r.facts, derived, step.outputs)
	}
	return step, nil
}

// stepOf is a ladder step from a measured row; facts per input are those
// the row stored (0 for the floor).
func stepOf(r benchRow, name, keeps string) ladderStep {
	s := ladderStep{name: name, keeps: keeps, inputs: r.inputs, perSec: r.perSec, cpuUS: r.cpuUS, serverUS: r.serverUS, outputs: r.outputs}
	if r.inputs > 0 {
		s.facts = float64(r.facts) / float64(r.inputs)
	}
	return s
}

// reportLadder prints the ladder's table and its conclusion.
func (b *bench) reportLadder(steps []ladderStep, cheapOf int) {
	fmt.Fprintf(b.out, "\nCost ladder: the pipeline's costs added to the floor one step at a time, this run (step 3: the %d of %d inputs whose facts are all ventilator readings, published alone, so that none can affect a derivation):\n\n",
		steps[min(2, len(steps)-1)].inputs, cheapOf)
	tw := tabwriter.NewWriter(b.out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "step\tinputs\tinputs/s\tservice CPU us/input\tPostgreSQL CPU us/input\tfacts/input\toutputs\tratio to floor\tadded wall us/input\tadded CPU us/input\t")
	for i, s := range steps {
		addWall, addCPU := "-", "-"
		if i > 0 {
			addWall = fmt.Sprintf("%+.0f", s.wallUS()-steps[i-1].wallUS())
			addCPU = fmt.Sprintf("%+.0f", s.cpuUS+s.serverUS-steps[i-1].cpuUS-steps[i-1].serverUS)
		}
		fmt.Fprintf(tw, "%s\t%d\t%.0f\t%.0f\t%.0f\t%.2f\t%d\t%.2f\t%s\t%s\t\n", s.name, s.inputs, s.perSec, s.cpuUS, s.serverUS,
			s.facts, s.outputs, s.perSec/steps[0].perSec, addWall, addCPU)
	}
	tw.Flush()
	fmt.Fprintln(b.out, "Service CPU is this process (service code and the embedded NATS server); added CPU is service plus PostgreSQL over the step before; added wall time is 1/inputs/s over the step before.")
	for _, l := range ladderConclusion(steps, targetFloorRatio, runtime.NumCPU()) {
		fmt.Fprintln(b.out, "  "+l)
	}
}

// ladderConclusion states, from the measured steps (steps[0] the floor):
//
//   - the step that adds the most wall time per input (1/inputs/s over the
//     step before), its share of the gap between the floor and the last
//     step, and the CPU it adds;
//   - the ratio to the floor of every step (the best the pipeline can reach
//     while doing the work of the steps up to it) and the first under
//     target: every later step keeps its work;
//   - each step's own added time on the floor alone, wall(floor) /
//     (wall(floor) + added), an estimate of the best ratio were every other
//     step free; for the lowest under target, how far its added time must
//     fall to allow the target: to wall(floor) x (1/target - 1);
//   - with the server's CPU measured (a local PostgreSQL), the most inputs/s
//     cores can sustain at each step's service + PostgreSQL CPU per input,
//     cores x 1e6 / CPU, a bound no overlap can beat, and the first step
//     whose bound is under target of the floor.
func ladderConclusion(steps []ladderStep, target float64, cores int) []string {
	if len(steps) < 2 || steps[0].perSec <= 0 {
		return []string{"conclusion: no step beyond the floor measured"}
	}
	floor, last := steps[0], steps[len(steps)-1]
	added := make([]float64, len(steps))
	big := 1
	for k := 1; k < len(steps); k++ {
		if added[k] = steps[k].wallUS() - steps[k-1].wallUS(); added[k] > added[big] {
			big = k
		}
	}
	gap := last.wallUS() - floor.wallUS()
	share := ""
	if gap > 0 {
		share = fmt.Sprintf(", %.0f%% of the %.0f us from the floor to step %d", 100*added[big]/gap, gap, len(steps))
	}
	out := []string{fmt.Sprintf("conclusion: step %q costs most: %+.0f us of wall time per input%s (%+.0f us service CPU, %+.0f us PostgreSQL CPU)",
		steps[big].name, added[big], share, steps[big].cpuUS-steps[big-1].cpuUS, steps[big].serverUS-steps[big-1].serverUS)}

	var best []string
	for _, s := range steps[1:] {
		best = append(best, fmt.Sprintf("%.2f", s.perSec/floor.perSec))
	}
	l := fmt.Sprintf("best ratio to the floor with the work of steps 2..%d kept: %s", len(steps), strings.Join(best, ", "))
	under := false
	for k := 1; k < len(steps) && !under; k++ {
		if r := steps[k].perSec / floor.perSec; r < target {
			under = true
			l += fmt.Sprintf("; step %q alone reaches %.2f, under the %.1f target", steps[k].name, r, target)
			if k < len(steps)-1 {
				l += fmt.Sprintf(": every later step keeps its work, so the target cannot be met unless the cost of %s falls (or it is dropped)", steps[k].keeps)
			} else {
				l += fmt.Sprintf(": the steps before it reach the target, so the gap is in %s", steps[k].keeps)
			}
		}
	}
	if !under {
		l += fmt.Sprintf("; every step reaches the %.1f target", target)
	}
	out = append(out, l)

	var alone []string
	worst := 1
	ratioAlone := func(k int) float64 { return floor.wallUS() / (floor.wallUS() + added[k]) }
	for k := 1; k < len(steps); k++ {
		alone = append(alone, fmt.Sprintf("%.2f", ratioAlone(k)))
		if ratioAlone(k) < ratioAlone(worst) {
			worst = k
		}
	}
	l = fmt.Sprintf("each step's added time on the floor alone (every other step free) allows: %s", strings.Join(alone, ", "))
	if r := ratioAlone(worst); r < target {
		allowed := floor.wallUS() * (1/target - 1)
		l += fmt.Sprintf("; step %q alone allows %.2f: even with every other step free, the %.1f target needs its added time cut from %.0f to %.0f us per input (%.1fx), or %s dropped",
			steps[worst].name, r, target, added[worst], allowed, added[worst]/allowed, steps[worst].keeps)
	}
	out = append(out, l)
	if cores < 1 || floor.serverUS <= 0 {
		// Without the server's CPU (a remote PostgreSQL) there is no
		// machine-wide bound to state.
		return out
	}
	var caps []string
	capOf := func(s ladderStep) float64 { return float64(cores) * 1e6 / (s.cpuUS + s.serverUS) }
	first := -1
	for k := 1; k < len(steps); k++ {
		caps = append(caps, fmt.Sprintf("%.0f/s (%.2f)", capOf(steps[k]), capOf(steps[k])/floor.perSec))
		if first < 0 && capOf(steps[k])/floor.perSec < target {
			first = k
		}
	}
	l = fmt.Sprintf("CPU bound: %d cores over the service + PostgreSQL CPU per input allow at most, whatever runs in parallel (ratio to this run's floor): %s", cores, strings.Join(caps, ", "))
	if first > 0 {
		l += fmt.Sprintf("; step %q needs %.0f us of CPU per input, so on this machine the %.1f target cannot be met without cutting the CPU of %s",
			steps[first].name, steps[first].cpuUS+steps[first].serverUS, target, steps[first].keeps)
	}
	return append(out, l)
}
