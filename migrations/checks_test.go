package migrations_test

import (
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// TestRewrittenChecksAcceptSameStrings checks that every CHECK 0003 rewrote
// accepts exactly the strings its 0001/0002 form accepted. The reference is
// the original pattern (as 0001/0002 wrote it) evaluated by PostgreSQL's own
// regex engine; the rewrite is the constraint as the migrated database holds
// it (pg_get_constraintdef), evaluated over the same strings. The strings
// are every length from 0 to 80 around each bound, plus each with one
// character outside the class (upper case, '/', space, newline, a
// non-ASCII letter) at its start, middle and end.
func TestRewrittenChecksAcceptSameStrings(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)

	const (
		hex64 = `^[0-9a-f]{64}$`
		hex32 = `^[0-9a-f]{32}$`
		pat   = `^Patient/[A-Za-z0-9.-]{1,64}$`
	)
	hexes := candidates("", "0123456789abcdef")
	pats := candidates("Patient/", "aZ09.-")
	refs := append(candidates("Observation/", "aZ09.-"), candidates("O", "bZ")...)
	refs = append(refs, "Observation//a", "observation/a", "Obs/a/b", "/a", "O/a",
		"urn:uuid:12345678-1234-1234-1234-123456789abc", "urn:uuid:12345678-1234-1234-1234-123456789ab",
		"urn:oid:1.2.840.10008", "urn:oid:3.1", "urn:uuid:"+strings.Repeat("a", 36))
	tests := []struct {
		constraint string
		column     string
		original   string // the 0001/0002 expression over column
		values     []string
	}{
		// The inbox, dead letter, derivation, refusal and head rewrites
		// were dropped by 0013: TestServiceChecksDropped.
		{"input_resource_digest_check", "digest", "digest ~ '" + hex64 + "'", hexes},
		{"input_resource_patient_hash_check", "patient_hash", "patient_hash ~ '" + hex32 + "'", hexes},
		{"input_resource_patient_ref_check", "patient_ref", "patient_ref ~ '" + pat + "'", pats},
		// As 0002 wrote it.
		{"input_resource_reference_check", "reference", `reference ~ '^[A-Z][A-Za-z]+/[A-Za-z0-9.-]{1,64}$'
			OR reference ~ '^urn:uuid:[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$'
			OR reference ~ '^urn:oid:[0-2](\.(0|[1-9][0-9]*))+$'`, refs},
	}
	for _, tc := range tests {
		t.Run(tc.constraint, func(t *testing.T) {
			var def string
			if err := conn.QueryRow(ctx, `SELECT pg_get_constraintdef(oid) FROM pg_constraint
				WHERE conname = $1 AND connamespace = 'public'::regnamespace`, tc.constraint).Scan(&def); err != nil {
				t.Fatalf("constraint %s: %v", tc.constraint, err)
			}
			expr, ok := strings.CutPrefix(def, "CHECK ")
			if !ok {
				t.Fatalf("constraint %s is not a CHECK: %s", tc.constraint, def)
			}
			// A CHECK passes unless its expression is false.
			q := `SELECT ` + tc.column + `, (` + tc.original + `) IS NOT FALSE, (` + expr + `) IS NOT FALSE
				FROM unnest($1::text[]) AS t(` + tc.column + `)`
			rows, err := conn.Query(ctx, q, tc.values)
			if err != nil {
				t.Fatal(err)
			}
			var n, accepted int
			for rows.Next() {
				var v string
				var want, got bool
				if err := rows.Scan(&v, &want, &got); err != nil {
					t.Fatal(err)
				}
				n++
				if want {
					accepted++
				}
				if got != want {
					t.Errorf("%q: migrated check accepts = %v, original = %v", v, got, want)
				}
			}
			if err := rows.Err(); err != nil {
				t.Fatal(err)
			}
			if n != len(tc.values) || accepted == 0 || accepted == n {
				t.Errorf("%d strings, %d accepted by the original: want some accepted and some refused", n, accepted)
			}
		})
	}
}

// candidates returns prefix followed by 0 to 80 characters cycling through
// valid, and each of those with one invalid character at the start, middle
// or end of the part after prefix.
func candidates(prefix, valid string) []string {
	bad := []string{"A", "F", "g", "/", " ", "\n", "é", "_"}
	var out []string
	for n := 0; n <= 80; n++ {
		var b strings.Builder
		for i := range n {
			b.WriteByte(valid[i%len(valid)])
		}
		s := b.String()
		out = append(out, prefix+s)
		if n == 0 {
			continue
		}
		for _, c := range bad {
			if strings.Contains(valid, c) {
				continue
			}
			out = append(out, prefix+c+s[1:], prefix+s[:n/2]+c+s[n/2+1:], prefix+s[:n-1]+c)
		}
	}
	return out
}

// TestServiceChecksDropped checks what migration 0013 did: the pattern
// CHECKs on values the service computes are gone from the non-fact tables,
// and the CHECKs that guard invariants are still there.
func TestServiceChecksDropped(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	exists := func(name string) bool {
		t.Helper()
		var n int
		if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_constraint WHERE conname = $1 AND connamespace = 'public'::regnamespace`, name).Scan(&n); err != nil {
			t.Fatal(err)
		}
		return n == 1
	}
	for _, name := range []string{"inbox_inbox_key_check", "dead_letter_inbox_key_check",
		"derivation_patient_ref_check", "derivation_patient_hash_check", "derivation_digest_check", "derivation_kind_check",
		"refusal_patient_ref_check", "refusal_patient_hash_check", "refusal_digest_check", "refusal_kind_check", "refusal_reason_check",
		"head_patient_hash_check", "head_digest_check"} {
		if exists(name) {
			t.Errorf("%s still exists", name)
		}
	}
	for _, name := range []string{"derivation_key_parts", "refusal_key_parts", "head_key_parts", "derivation_supersedes_previous",
		"derivation_positive_amounts", "derivation_fraction_in_range", "derivation_positive_kinds", "derivation_retraction_reason",
		"head_refused_has_refusal", "derivation_status_check", "head_status_check", "dead_letter_reason_check", "outbox_subject_check",
		// The fact CHECKs went with the fact table in 0014: fact_row keeps
		// the digest as 32 bytes, and fact_term guards the quantity, origin,
		// specimen and status once per distinct term.
		"fact_blood_gas_has_specimen"} {
		if !exists(name) {
			t.Errorf("%s is gone; it guards an invariant", name)
		}
	}
	// No pattern CHECK is left on these tables.
	var left []string
	rows, err := conn.Query(ctx, `SELECT conname FROM pg_constraint
		WHERE conrelid IN ('inbox'::regclass, 'derivation'::regclass, 'refusal'::regclass, 'head'::regclass)
		  AND contype = 'c' AND pg_get_constraintdef(oid) LIKE '%~%' ORDER BY 1`)
	if err != nil {
		t.Fatal(err)
	}
	if left, err = pgx.CollectRows(rows, pgx.RowTo[string]); err != nil {
		t.Fatal(err)
	}
	if len(left) > 0 {
		t.Errorf("pattern CHECKs left on inbox, derivation, refusal, head: %v", left)
	}
}
