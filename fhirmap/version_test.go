package fhirmap

import (
	"math/rand/v2"
	"slices"
	"testing"
	"time"
)

func ver(key, versionID string, lu int, st Status, dig string, eff int) Fact {
	f := Fact{Key: key, VersionID: versionID, Status: st, Digest: dig,
		Effective: time.Date(2026, 11, 20, 8, eff, 0, 0, time.UTC)}
	if lu > 0 {
		f.LastUpdated = time.Date(2026, 11, 20, 9, lu, 0, 0, time.UTC)
	}
	return f
}

// TestCurrent checks the version rule and that it does not depend on the
// order in which versions arrive.
func TestCurrent(t *testing.T) {
	cases := []struct {
		name     string
		versions []Fact
		want     string // Digest of the winner
	}{
		{"numeric_versionId_beats_later_lastUpdated",
			[]Fact{ver("k", "2", 1, StatusFinal, "a", 0), ver("k", "10", 0, StatusFinal, "b", 0)}, "b"},
		{"versionId_compared_as_numbers_not_text",
			[]Fact{ver("k", "9", 0, StatusFinal, "a", 0), ver("k", "10", 0, StatusFinal, "b", 0)}, "b"},
		{"lastUpdated_when_a_versionId_is_missing",
			[]Fact{ver("k", "7", 1, StatusFinal, "a", 0), ver("k", "", 2, StatusFinal, "b", 0)}, "b"},
		{"lastUpdated_when_a_versionId_is_not_numeric",
			[]Fact{ver("k", "W/\"3\"", 5, StatusFinal, "a", 0), ver("k", "2", 2, StatusFinal, "b", 0)}, "a"},
		{"status_when_no_versions_or_times",
			[]Fact{ver("k", "", 0, StatusFinal, "b", 0), ver("k", "", 0, StatusEnteredInError, "a", 0),
				ver("k", "", 0, StatusCorrected, "c", 0)}, "a"},
		{"status_breaks_a_versionId_tie",
			[]Fact{ver("k", "3", 0, StatusAmended, "a", 0), ver("k", "3", 0, StatusPreliminary, "b", 0)}, "a"},
		{"digest_breaks_the_last_tie",
			[]Fact{ver("k", "", 0, StatusFinal, "0a", 0), ver("k", "", 0, StatusFinal, "f0", 0)}, "f0"},
		// Pairwise "versionId when both have one, else lastUpdated" would
		// cycle here (C>A by version, A>B by time, B>C by time).
		{"no_cycle_with_mixed_versionIds",
			[]Fact{ver("k", "2", 30, StatusFinal, "A", 0), ver("k", "", 20, StatusFinal, "B", 0),
				ver("k", "3", 10, StatusFinal, "C", 0)}, "A"},
	}
	rng := rand.New(rand.NewPCG(1, 2))
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			for range 20 {
				vs := slices.Clone(c.versions)
				rng.Shuffle(len(vs), func(i, j int) { vs[i], vs[j] = vs[j], vs[i] })
				got := Current(vs)
				if len(got) != 1 || got[0].Digest != c.want {
					t.Fatalf("order %v: got %v, want %s", digests(vs), digests(got), c.want)
				}
			}
		})
	}
}

func digests(fs []Fact) []string {
	var out []string
	for _, f := range fs {
		out = append(out, f.Digest)
	}
	return out
}

func TestCurrentSortsAndKeepsKeys(t *testing.T) {
	in := []Fact{
		ver("b", "1", 0, StatusFinal, "b1", 5), ver("a", "1", 0, StatusFinal, "a1", 5),
		ver("c", "1", 0, StatusFinal, "c1", 1), ver("b", "2", 0, StatusEnteredInError, "b2", 5),
	}
	orig := slices.Clone(in)
	got := Current(in)
	if want := []string{"c1", "a1", "b2"}; !slices.Equal(digests(got), want) {
		t.Fatalf("got %v, want %v (by effective, then key; retraction kept)", digests(got), want)
	}
	if !slices.EqualFunc(in, orig, func(a, b Fact) bool { return a.Digest == b.Digest }) {
		t.Error("input modified")
	}
	if Current(nil) != nil {
		t.Error("Current(nil) not nil")
	}
}
