package main

import (
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
)

// TestLadderConclusion checks the ladder's conclusion against arithmetic
// done by hand. Floor 10,000/s, decode 8,000/s, cheap path 4,000/s, full
// pipeline 1,000/s: wall time per input 100, 125, 250 and 1,000 us, so the
// steps add 25, 125 and 750 us; the last adds most, 750 of the 900 us
// between floor and step 4 (83%); ratios to the floor 0.80, 0.40, 0.10, so
// step 3 is the first under 0.5. Each step's addition on the floor alone
// allows 100/125 = 0.80, 100/225 = 0.44 and 100/850 = 0.12; for 0.5 the
// last may add at most 100 us (100 x (1/0.5 - 1)), 7.5x less than 750.
func TestLadderConclusion(t *testing.T) {
	steps := []ladderStep{
		{name: "floor", perSec: 10000, cpuUS: 40, serverUS: 45},
		{name: "decode", keeps: "the decode", perSec: 8000, cpuUS: 90, serverUS: 45},
		{name: "cheap", keeps: "the rows", perSec: 4000, cpuUS: 200, serverUS: 250},
		{name: "full", keeps: "the derivations", perSec: 1000, cpuUS: 450, serverUS: 550},
	}
	check := func(got []string, wants ...string) {
		t.Helper()
		all := strings.Join(got, "\n")
		for _, want := range wants {
			if !strings.Contains(all, want) {
				t.Errorf("conclusion lacks\n  %s\ngot\n  %s", want, all)
			}
		}
	}
	check(ladderConclusion(steps, 0.5, 2),
		`conclusion: step "full" costs most: +750 us of wall time per input, 83% of the 900 us from the floor to step 4 (+250 us service CPU, +300 us PostgreSQL CPU)`,
		`best ratio to the floor with the work of steps 2..4 kept: 0.80, 0.40, 0.10; step "cheap" alone reaches 0.40, under the 0.5 target: every later step keeps its work, so the target cannot be met unless the cost of the rows falls (or it is dropped)`,
		`each step's added time on the floor alone (every other step free) allows: 0.80, 0.44, 0.12; step "full" alone allows 0.12: even with every other step free, the 0.5 target needs its added time cut from 750 to 100 us per input (7.5x), or the derivations dropped`,
		// 2 cores: 2e6 / (90 + 45) = 14,815/s (1.48 of the floor),
		// 2e6 / 450 = 4,444/s (0.44), 2e6 / 1,000 = 2,000/s (0.20).
		`CPU bound: 2 cores over the service + PostgreSQL CPU per input allow at most, whatever runs in parallel (ratio to this run's floor): 14815/s (1.48), 4444/s (0.44), 2000/s (0.20); step "cheap" needs 450 us of CPU per input, so on this machine the 0.5 target cannot be met without cutting the CPU of the rows`)
	// 8 cores: 8e6 / 450 = 17,778/s (1.78), 8e6 / 1,000 = 8,000/s (0.80):
	// no step is bound under the target.
	if got := strings.Join(ladderConclusion(steps, 0.5, 8), "\n"); !strings.Contains(got, "(ratio to this run's floor): 59259/s (5.93), 17778/s (1.78), 8000/s (0.80)\n") &&
		!strings.HasSuffix(got, "(ratio to this run's floor): 59259/s (5.93), 17778/s (1.78), 8000/s (0.80)") {
		t.Errorf("8 cores: %s", got)
	}
	// A remote server (no PostgreSQL CPU measured): no CPU bound.
	remote := slices.Clone(steps)
	remote[0].serverUS = 0
	if got := strings.Join(ladderConclusion(remote, 0.5, 2), "\n"); strings.Contains(got, "CPU bound") {
		t.Errorf("a CPU bound without the server's CPU: %s", got)
	}

	// Decode 5,000/s and cheap path 6,000/s: walls 100, 200, 166.7,
	// 1,000; the decode adds 100 us, the cheap step -33 us (noise can do
	// that), the full step 833 us (of 900: 93%). Only step 4 is under 0.5
	// (the decode's 0.50 is not under it); alone, 100/200 = 0.50,
	// 100/66.7 = 1.50 and 100/933 = 0.11, the last 8.3x over its 100 us.
	steps[1].perSec, steps[2].perSec = 5000, 6000
	check(ladderConclusion(steps, 0.5, 2),
		`conclusion: step "full" costs most: +833 us of wall time per input, 93% of the 900 us`,
		`kept: 0.50, 0.60, 0.10; step "full" alone reaches 0.10, under the 0.5 target: the steps before it reach the target, so the gap is in the derivations`,
		`allows: 0.50, 1.50, 0.11; step "full" alone allows 0.11: even with every other step free, the 0.5 target needs its added time cut from 833 to 100 us per input (8.3x)`)

	// 5,100, 5,080 and 5,000/s: walls 196.1, 196.9, 200; the decode adds
	// most (96 of 100 us) and every ratio is at least 0.5.
	steps[1].perSec, steps[2].perSec, steps[3].perSec = 5100, 5080, 5000
	got := ladderConclusion(steps, 0.5, 2)
	check(got,
		`conclusion: step "decode" costs most: +96 us of wall time per input, 96% of the 100 us`,
		`kept: 0.51, 0.51, 0.50; every step reaches the 0.5 target`,
		`allows: 0.51, 0.99, 0.97`)
	if strings.Contains(strings.Join(got, "\n"), "needs its added time cut") {
		t.Errorf("every step within the target, yet a cut is asked for: %q", got)
	}
	if got := ladderConclusion(steps[:1], 0.5, 2); len(got) != 1 || !strings.Contains(got[0], "no step beyond the floor") {
		t.Errorf("a ladder of the floor alone: %q", got)
	}
}

// checkBenchLadder checks the cost ladder of a bench report of msgs inputs
// with a one-replica run: four rows in order, the structure every run
// guarantees (the floor stores no facts; steps 2 to 4 decode or store
// facts; only step 4 derives; step 3 takes a proper subset of the inputs),
// the ratio and added-wall columns as arithmetic on the inputs/s column,
// and a conclusion consistent with the rows. No timing is judged.
func checkBenchLadder(t *testing.T, report string, msgs int) {
	t.Helper()
	if !strings.Contains(report, "Cost ladder:") {
		t.Fatal("no cost ladder in the report")
	}
	section := report[strings.Index(report, "Cost ladder:"):]
	type row struct {
		inputs                 int
		perSec, cpu, pg, facts float64
		outputs                int
		ratio, addWall         float64
		hasAdd                 bool
	}
	var rows []row
	for _, name := range []string{ladderFloor, ladderDecode, ladderCheap, ladderFull} {
		re := regexp.MustCompile(`(?m)^\s*` + regexp.QuoteMeta(name) +
			`\s+([0-9]+)\s+([0-9.]+)\s+([0-9.]+)\s+([0-9.]+)\s+([0-9.]+)\s+([0-9]+)\s+([0-9.]+)\s+([-+][0-9]+|-)\s+([-+][0-9]+|-)\s*$`)
		m := re.FindStringSubmatch(section)
		if m == nil {
			t.Fatalf("no ladder row %q in\n%s", name, section)
		}
		f := func(i int) float64 { v, _ := strconv.ParseFloat(m[i], 64); return v }
		r := row{inputs: int(f(1)), perSec: f(2), cpu: f(3), pg: f(4), facts: f(5), outputs: int(f(6)), ratio: f(7), addWall: f(8), hasAdd: m[8] != "-"}
		rows = append(rows, r)
	}
	if strings.Index(section, ladderFloor) > strings.Index(section, ladderDecode) ||
		strings.Index(section, ladderDecode) > strings.Index(section, ladderCheap) ||
		strings.Index(section, ladderCheap) > strings.Index(section, ladderFull) {
		t.Error("ladder rows out of order")
	}
	floor := rows[0]
	if floor.ratio != 1 || floor.facts != 0 || floor.outputs != 0 || floor.hasAdd {
		t.Errorf("floor row %+v: want ratio 1, no facts, no outputs, nothing added", floor)
	}
	for i, r := range rows {
		if r.perSec <= 0 || r.cpu <= 0 {
			t.Errorf("step %d: inputs/s %g, service CPU %g: want both positive", i+1, r.perSec, r.cpu)
		}
		if i > 0 && (!r.hasAdd || r.facts <= 0) {
			t.Errorf("step %d: %+v: want facts per input and added costs", i+1, r)
		}
		if (i < 3) != (r.outputs == 0) {
			t.Errorf("step %d: %d outputs: want none before step 4 and some at step 4", i+1, r.outputs)
		}
		// Ratio to the floor and added wall time are arithmetic on the
		// printed inputs/s (rounded to units, ratios to 2 decimals).
		if want := r.perSec / floor.perSec; r.ratio < want-0.006 || r.ratio > want+0.006 {
			t.Errorf("step %d: ratio %.2f, want inputs/s over the floor's %.3f", i+1, r.ratio, want)
		}
		if i > 0 {
			want := 1e6/r.perSec - 1e6/rows[i-1].perSec
			if d := r.addWall - want; d < -1-0.01*abs(want) || d > 1+0.01*abs(want) {
				t.Errorf("step %d: added wall %g us, want 1e6/inputs/s over the step before: %.1f", i+1, r.addWall, want)
			}
		}
	}
	if rows[0].inputs != msgs || rows[1].inputs != msgs || rows[3].inputs != msgs || rows[2].inputs <= 0 || rows[2].inputs >= msgs {
		t.Errorf("ladder inputs %d, %d, %d, %d: want %d for steps 1, 2, 4 and a proper subset for step 3", rows[0].inputs, rows[1].inputs, rows[2].inputs, rows[3].inputs, msgs)
	}
	c := regexp.MustCompile(`conclusion: step "([^"]+)" costs most: ([-+][0-9]+) us of wall time per input`).FindStringSubmatch(section)
	b := regexp.MustCompile(`best ratio to the floor with the work of steps 2\.\.4 kept: ([0-9.]+), ([0-9.]+), ([0-9.]+); (step "([^"]+)" alone reaches|every step reaches)`).FindStringSubmatch(section)
	if c == nil || b == nil {
		t.Fatalf("no conclusion lines in\n%s", section)
	}
	names := []string{ladderFloor, ladderDecode, ladderCheap, ladderFull}
	most := rows[1].addWall
	for _, r := range rows[2:] {
		most = max(most, r.addWall)
	}
	named := slices.Index(names, c[1])
	if named < 1 || rows[named].addWall < most-1 || mustFloat(c[2]) != rows[named].addWall {
		t.Errorf("conclusion names %q (%s us) as costing most; the table's largest added wall time is %+g us", c[1], c[2], most)
	}
	first := ""
	for k := 1; k < 4; k++ {
		if mustFloat(b[k]) != rows[k].ratio {
			t.Errorf("conclusion ratio %s for step %d, table %.2f", b[k], k+1, rows[k].ratio)
		}
		if first == "" && rows[k].ratio < 0.5 {
			first = names[k]
		}
	}
	// The CPU bound, printed when the server's CPU was measured: cores x
	// 1e6 over each step's printed service + PostgreSQL CPU (rounded to
	// units, so within a few percent).
	if cb := regexp.MustCompile(`CPU bound: ([0-9]+) cores .*?: ([0-9]+)/s \(([0-9.]+)\), ([0-9]+)/s \(([0-9.]+)\), ([0-9]+)/s \(([0-9.]+)\)`).FindStringSubmatch(section); cb != nil {
		cores := mustFloat(cb[1])
		for k := 1; k < 4; k++ {
			want := cores * 1e6 / (rows[k].cpu + rows[k].pg)
			if got := mustFloat(cb[2*k]); got < 0.97*want-1 || got > 1.03*want+1 {
				t.Errorf("CPU bound of step %d: %g/s, want %g cores x 1e6 / %g us = %.0f/s", k+1, got, cores, rows[k].cpu+rows[k].pg, want)
			}
			if r := mustFloat(cb[2*k+1]); r < mustFloat(cb[2*k])/floor.perSec-0.01 || r > mustFloat(cb[2*k])/floor.perSec+0.01 {
				t.Errorf("CPU bound ratio of step %d: %g, want %s/s over the floor's %g/s", k+1, r, cb[2*k], floor.perSec)
			}
		}
	} else if floor.pg > 0 {
		t.Error("PostgreSQL CPU measured but no CPU bound line")
	}
	// A ratio printed as 0.50 may be just under the target: not judged.
	if !strings.Contains(b[0], "kept: 0.50") && !strings.Contains(b[0], ", 0.50") && b[5] != first {
		t.Errorf("conclusion's first step under 0.5 is %q, the table's %q", b[5], first)
	}
}

func mustFloat(s string) float64 { v, _ := strconv.ParseFloat(s, 64); return v }

func abs(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}
