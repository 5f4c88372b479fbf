package fhirmap

import (
	"slices"
	"strconv"
	"strings"
)

// Current returns the current version of every fact Key in facts, sorted
// by (Effective, Key). The choice depends only on the set of versions of a
// Key, never on their order, so replicas that receive versions in different
// orders agree. Among the versions of one Key, in this order:
//
//  1. if every version has a numeric meta.versionId, the highest wins;
//  2. else, among those left, if every one has meta.lastUpdated, the latest wins;
//  3. else, among those left, the highest status wins: entered-in-error >
//     cancelled > corrected > amended > final > preliminary > registered > unknown;
//  4. else the largest Digest wins (an arbitrary but stable tie-break).
//
// Each step keeps every version tied at the top and hands them to the next
// step, so versions with equal versionId are decided by time, then status,
// then digest. Versions that are byte-identical (same Digest) are one
// version. A rule that compares only pairs ("versionId when both have one,
// else lastUpdated") is not a total order when some versions lack a
// versionId and could pick differently by arrival order; applying each
// criterion to the whole group avoids that.
//
// Current does not drop retractions: a current version with status
// cancelled or entered-in-error is returned, so that the caller can withdraw
// what was derived from the Key. The input slice is not modified.
func Current(facts []Fact) []Fact {
	if len(facts) == 0 {
		return nil
	}
	byKey := make(map[string][]int, len(facts))
	keys := make([]string, 0, len(facts))
	for i := range facts {
		k := facts[i].Key
		if _, ok := byKey[k]; !ok {
			keys = append(keys, k)
		}
		byKey[k] = append(byKey[k], i)
	}
	out := make([]Fact, 0, len(keys))
	for _, k := range keys {
		out = append(out, facts[pickCurrent(facts, byKey[k])])
	}
	slices.SortFunc(out, func(a, b Fact) int {
		if c := a.Effective.Compare(b.Effective); c != 0 {
			return c
		}
		return strings.Compare(a.Key, b.Key)
	})
	return out
}

// pickCurrent applies the rule of Current to the versions idx of one Key.
func pickCurrent(facts []Fact, idx []int) int {
	if len(idx) == 1 {
		return idx[0]
	}
	cand := slices.Clone(idx)

	// 1. numeric versionId, only when every candidate has one.
	allNumeric := true
	vers := make([]uint64, len(cand))
	for i, j := range cand {
		v, err := strconv.ParseUint(facts[j].VersionID, 10, 64)
		if err != nil {
			allNumeric = false
			break
		}
		vers[i] = v
	}
	if allNumeric {
		best := slices.Max(vers)
		cand = keep(cand, func(i, _ int) bool { return vers[i] == best })
	}

	// 2. lastUpdated, only when every remaining candidate has one.
	allTimed := true
	for _, j := range cand {
		if facts[j].LastUpdated.IsZero() {
			allTimed = false
			break
		}
	}
	if allTimed {
		best := facts[cand[0]].LastUpdated
		for _, j := range cand[1:] {
			if facts[j].LastUpdated.After(best) {
				best = facts[j].LastUpdated
			}
		}
		cand = keep(cand, func(_, j int) bool { return facts[j].LastUpdated.Equal(best) })
	}

	// 3. status precedence.
	bestRank := -2
	for _, j := range cand {
		bestRank = max(bestRank, facts[j].Status.rank())
	}
	cand = keep(cand, func(_, j int) bool { return facts[j].Status.rank() == bestRank })

	// 4. largest digest; among equal digests the versions are the same
	// resource, so any is right, and the first by index is taken.
	win := cand[0]
	for _, j := range cand[1:] {
		if facts[j].Digest > facts[win].Digest {
			win = j
		}
	}
	return win
}

// keep returns the elements of cand for which ok(position, value) holds.
func keep(cand []int, ok func(i, j int) bool) []int {
	out := cand[:0:0]
	for i, j := range cand {
		if ok(i, j) {
			out = append(out, j)
		}
	}
	return out
}
