package review

import (
	"context"
	"net/http"
	"net/http/httptest"
	"net/url"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// benchFillSQL fills a migrated store directly (as the superuser: the
// pipeline would take far too long for 216,000 ventilator readings and
// 10,000 patients) with what the console reads: facts, derivations, their
// heads and their blood-gas input. $1 is the number of patients of the
// list (3 blood gases each, 7 kinds per blood gas); one more patient,
// Patient/bench-long, has a 30-day stay with five ventilator quantities
// every minute and a blood gas every 4 hours. The values are invented and
// plausible; they are not physiology under test.
const benchFillSQL = `
INSERT INTO inbox_subject (subject) VALUES ('bench');
INSERT INTO inbox VALUES (decode(repeat('a', 64), 'hex'), (SELECT id FROM inbox_subject), 0, now(), now(), 0, 0);
CREATE TEMP TABLE g AS
SELECT 'Patient/bench-long' AS ref, 'Observation/bl-abg-' || i || '#http://loinc.org|2019-8' AS bg,
       'Observation/bl-abg-' || i AS res, timestamptz '2026-03-01 00:30:00Z' + i * interval '4 hours' AS eff, i AS n
FROM generate_series(0, 179) i
UNION ALL
SELECT 'Patient/bench-' || lpad(p::text, 5, '0'), 'Observation/b' || p || '-abg-' || i || '#http://loinc.org|2019-8',
       'Observation/b' || p || '-abg-' || i, timestamptz '2026-03-01 00:30:00Z' + i * interval '4 hours' + p * interval '1 second', p + i
FROM generate_series(1, $1::int) p, generate_series(0, 2) i;
-- Facts in the columns of the view fact, then stored as migration 0014
-- stores them (fact_row with its lookup rows).
CREATE TEMP TABLE fact_in (key text, digest text, resource_ref text, version_id text, patient_ref text,
    encounter text, quantity text, origin text, detail text, specimen text, temp_corrected boolean,
    value float8, unit text, text text, source_value float8, source_unit text, code_system text, code text,
    code_display text, status text, effective timestamptz, inbox_key text, recorded_at timestamptz);
INSERT INTO fact_in (key, digest, resource_ref, version_id, patient_ref, encounter, quantity, origin, detail,
    specimen, temp_corrected, value, unit, text, source_value, source_unit, code_system, code, code_display, status,
    effective, inbox_key, recorded_at)
SELECT bg, repeat('b', 64), res, '1', ref, '', 'pco2', 'measured', '', 'arterial', false,
       40 + (n % 7), 'mm[Hg]', '', 0, '', 'http://loinc.org', '2019-8', '', 'final', eff, repeat('a', 64), eff
FROM g;
INSERT INTO fact_in (key, digest, resource_ref, version_id, patient_ref, encounter, quantity, origin, detail,
    specimen, temp_corrected, value, unit, text, source_value, source_unit, code_system, code, code_display, status,
    effective, inbox_key, recorded_at)
SELECT 'Observation/bl-' || q.n || '-' || m || '#http://loinc.org|x', repeat('b', 64), 'Observation/bl-' || q.n || '-' || m,
       '1', 'Patient/bench-long', '', q.n, 'measured', '', '', false, q.base * (1 + 0.1 * sin(m / 50.0)),
       q.unit, '', 0, '', 'http://loinc.org', 'x', '', 'final', timestamptz '2026-03-01 00:00:00Z' + m * interval '1 minute',
       repeat('a', 64), timestamptz '2026-03-01 00:00:00Z' + m * interval '1 minute'
FROM generate_series(0, 30 * 24 * 60 - 1) m,
     (VALUES ('tidal-volume', 450, 'mL'), ('resp-rate', 20, '/min'), ('minute-volume', 9, 'L/min'),
             ('vco2', 220, 'mL/min'), ('petco2', 38, 'mm[Hg]')) q(n, base, unit);
SELECT ventderive_fact_partitions(timestamptz '2026-03-01 00:00:00Z', timestamptz '2026-05-01 00:00:00Z');
INSERT INTO fact_encounter (encounter) SELECT DISTINCT encounter FROM fact_in ON CONFLICT DO NOTHING;
INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit, code_system, code,
    code_display, status)
SELECT DISTINCT quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit, code_system, code,
    code_display, status FROM fact_in ON CONFLICT DO NOTHING;
INSERT INTO fact_row (key, digest, resource_ref, version_id, patient_ref, encounter_id, term_id, quantity, value,
    source_value, effective, inbox_key, recorded_at)
SELECT f.key, decode(f.digest, 'hex'), nullif(f.resource_ref, split_part(f.key, '#', 1)), f.version_id, f.patient_ref, e.id, t.id,
    f.quantity, f.value, f.source_value, f.effective, decode(f.inbox_key, 'hex'), f.recorded_at
FROM fact_in f JOIN fact_encounter e USING (encounter)
JOIN fact_term t USING (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit, code_system, code,
    code_display, status);
INSERT INTO derivation (key, version, observation_id, kind, patient_ref, patient_hash, encounter, blood_gas_key, effective,
    value, unit, method, method_version, constants, assumptions, basis, interp_code, interp_text, interp_source, flags,
    status, retracted, algorithm, digest, inbox_key, created_at)
SELECT ref || '|' || bg || '|' || k.kind, 1, gen_random_uuid(), k.kind, ref, repeat('c', 32), '', bg, eff,
       k.v + 0.01 * (n % 5), k.unit, 'bench', '1', '[]', '[]', 'bench basis', '', '', '', '[]', 'final', '', 'bench',
       repeat('d', 64), decode(repeat('a', 64), 'hex'), eff
FROM g, (VALUES ('deadspace-fraction-vco2', 0.45, '1'), ('deadspace-fraction-estimated', 0.5, '1'),
                ('paco2-predicted', 40.0, 'mm[Hg]'), ('paco2-measured-minus-predicted', 2.0, 'mm[Hg]'),
                ('paco2-petco2-gradient', 6.0, 'mm[Hg]'), ('alveolar-deadspace-fraction', 0.15, '1'),
                ('ventilatory-ratio', 1.4, '1')) k(kind, v, unit);
INSERT INTO head (key, kind, patient_ref, patient_hash, blood_gas_key, version, refused, derivation_id, refusal_id, digest,
    status, value, updated_at)
SELECT key, kind, patient_ref, patient_hash, blood_gas_key, 1, false, id, NULL, digest, status, value, created_at FROM derivation;
INSERT INTO derivation_input (derivation_id, ordinal, role, fact_key, fact_digest, resource_ref, time_offset, fallback)
SELECT id, 1, 'paco2', blood_gas_key, repeat('b', 64), split_part(blood_gas_key, '#', 1), interval '0', '' FROM derivation;
ANALYZE;`

// benchConsole is a console over a store filled by benchFillSQL, as the
// reviewer role in read-only transactions.
func benchConsole(b *testing.B, patients int) *Server {
	b.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	u := pgtest.NewDatabase(b)
	conn, err := pgx.Connect(ctx, u)
	if err != nil {
		b.Fatal(err)
	}
	// Simple protocol: several statements and one parameter.
	if _, err := conn.Exec(ctx, strings.ReplaceAll(benchFillSQL, "$1::int", itoa(patients)), pgx.QueryExecModeSimpleProtocol); err != nil {
		b.Fatalf("fill: %v", err)
	}
	conn.Close(ctx)
	roles, err := os.ReadFile("../../../../deploy/postgres/roles.sql")
	if err != nil {
		b.Fatal(err)
	}
	pgtest.ApplyRoles(b, u, string(roles))
	p, _ := url.Parse(u)
	q := p.Query()
	q.Set("options", "-crole=ventderive_reviewer")
	p.RawQuery = q.Encode()
	cfg, err := pgxpool.ParseConfig(p.String())
	if err != nil {
		b.Fatal(err)
	}
	cfg.ConnConfig.RuntimeParams["default_transaction_read_only"] = "on"
	pool, err := pgxpool.NewWithConfig(context.Background(), cfg)
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(pool.Close)
	s, err := New(NewStore(pool), Config{Loopback: true})
	if err != nil {
		b.Fatal(err)
	}
	return s
}

func itoa(n int) string { return strconv.Itoa(n) }

func benchPage(b *testing.B, s *Server, path string, wantIn string) {
	b.Helper()
	req := httptest.NewRequest(http.MethodGet, path, nil)
	size := 0
	for b.Loop() {
		rec := httptest.NewRecorder()
		s.ServeHTTP(rec, req)
		if rec.Code != 200 || !strings.Contains(rec.Body.String(), wantIn) {
			b.Fatalf("%s: status %d", path, rec.Code)
		}
		size = rec.Body.Len()
	}
	b.ReportMetric(float64(size), "bytes/page")
}

// BenchmarkTimeline30Days: the patient page (queries, plots and template)
// of a 30-day stay with minute ventilator data (216,000 readings, 180
// blood gases, 1,260 derived values). Target: under 300 ms.
func BenchmarkTimeline30Days(b *testing.B) {
	s := benchConsole(b, 0)
	benchPage(b, s, "/patients/bench-long", `id="fig-vent-tidal-volume"`)
}

// BenchmarkPatientList10000: the first page of the patient list over
// 10,000 patients (30,000 blood gases, 210,000 derived values) and the
// 30-day stay. Target: under 500 ms.
func BenchmarkPatientList10000(b *testing.B) {
	s := benchConsole(b, 10000)
	benchPage(b, s, "/patients", "Patient/bench-00001")
}
