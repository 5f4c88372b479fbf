package fhirmap

import (
	"bytes"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"
)

// The one-pass decoder (decode_fill.go) against the two-pass path it
// replaced (checkStrict, then encoding/json's Unmarshal: the reference,
// still the code that gives every refusal). The rule checked: whatever the
// input, Decode gives the same result and the same refusal (reason, field,
// detail, entry) with the one pass as with the two passes alone, and when
// the one pass accepts a resource, the two passes accept it too and fill
// an equal struct.

// decodeTwoPass is Decode with the one pass switched off: the decoder as it
// was before it (the reference).
func decodeTwoPass(raw []byte, codes *CodeTable) (Decoded, error) {
	onePass = false
	defer func() { onePass = true }()
	return Decode(raw, codes)
}

var fillSchemas = []struct {
	name   string
	schema *jsonSchema
}{
	{"Observation", obsSchema}, {"Patient", patientSchema}, {"Specimen", specimenSchema},
	{"Bundle", bundleSchema}, {"Goal", goalSchema},
}

// newOf returns a pointer to a zero value of s's struct type.
func newOf(s *jsonSchema) any { return reflect.New(s.typ).Interface() }

// sameAsTwoPass fails t when the one pass and the two passes disagree on
// raw, and reports how many of the five schemas the one pass accepted raw
// for.
func sameAsTwoPass(t testing.TB, raw []byte) int {
	t.Helper()
	got, gotErr := Decode(raw, nil)
	want, wantErr := decodeTwoPass(raw, nil)
	if !sameError(gotErr, wantErr) {
		t.Fatalf("refusal differs:\none pass:  %v\ntwo passes: %v\ninput: %q", gotErr, wantErr, clip(raw))
	}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("result differs:\none pass:  %+v\ntwo passes: %+v\ninput: %q", got, want, clip(raw))
	}
	for _, key := range []string{"resourceType", "id"} {
		if got, want := peekTopString(raw, key), peekTopStringRef(raw, key); got != want {
			t.Fatalf("peekTopString(%q) = %q, before %q: %q", key, got, want, clip(raw))
		}
	}
	accepted := 0
	for _, fs := range fillSchemas {
		one := newOf(fs.schema)
		if !fillStrict(raw, fs.schema, one) {
			continue
		}
		accepted++
		two := newOf(fs.schema)
		if de := strictUnmarshalTwoPass(raw, fs.schema, fs.name, -1, two); de != nil {
			t.Fatalf("%s: the one pass accepted what the two passes refuse (%v): %q", fs.name, de, clip(raw))
		}
		if !reflect.DeepEqual(one, two) {
			t.Fatalf("%s: the one pass filled another value:\none pass:  %+v\ntwo passes: %+v\ninput: %q", fs.name, one, two, clip(raw))
		}
	}
	return accepted
}

// peekTopStringRef is peekTopString as it was before it read plain strings
// itself: every string value through json.Unmarshal.
func peekTopStringRef(data []byte, key string) string {
	w := walker{data: data}
	w.ws()
	if w.peek() != '{' {
		return ""
	}
	w.pos++
	for {
		w.ws()
		switch w.peek() {
		case 0, '}':
			return ""
		case ',':
			w.pos++
			w.ws()
		}
		k, ok := w.key()
		if !ok {
			return ""
		}
		w.ws()
		if w.peek() != ':' {
			return ""
		}
		w.pos++
		w.ws()
		if string(k) == key && w.peek() == '"' {
			start := w.pos
			end, _, ok := w.skipString()
			var s string
			if !ok || json.Unmarshal(data[start:end], &s) != nil {
				return ""
			}
			return s
		}
		if !w.skipValue() {
			return ""
		}
	}
}

func sameError(a, b error) bool {
	if a == nil || b == nil {
		return a == nil && b == nil
	}
	da, oka := errors.AsType[*DecodeError](a)
	db, okb := errors.AsType[*DecodeError](b)
	return oka && okb && *da == *db && a.Error() == b.Error()
}

func clip(raw []byte) []byte {
	if len(raw) > 400 {
		return raw[:400]
	}
	return raw
}

// decodeInputs are the decoder goldens' inputs: each JSON file, and each
// line of the NDJSON files.
func decodeInputs(t testing.TB) map[string][]byte {
	t.Helper()
	out := map[string][]byte{}
	files, _ := filepath.Glob("testdata/decode/*.json")
	nd, _ := filepath.Glob("testdata/decode/*.ndjson")
	for _, name := range append(files, nd...) {
		raw, err := os.ReadFile(name)
		if err != nil {
			t.Fatal(err)
		}
		base := filepath.Base(name)
		if strings.HasSuffix(name, ".ndjson") {
			for i, line := range bytes.Split(raw, []byte{'\n'}) {
				if len(bytes.TrimSpace(line)) > 0 {
					out[base+":"+strconv.Itoa(i+1)] = line
				}
			}
			continue
		}
		out[base] = raw
	}
	if len(out) < 50 {
		t.Fatalf("only %d decoder inputs found", len(out))
	}
	return out
}

// FuzzDecodeSameAsTwoPass: the goldens' inputs as its seed corpus (run as
// a normal test); `go test -fuzz FuzzDecodeSameAsTwoPass ./fhirmap` looks
// further.
func FuzzDecodeSameAsTwoPass(f *testing.F) {
	inputs := decodeInputs(f)
	names := make([]string, 0, len(inputs))
	for name := range inputs {
		names = append(names, name)
	}
	sort.Strings(names)
	for _, name := range names {
		f.Add(inputs[name])
	}
	for _, in := range edgeInputs() {
		f.Add(in)
	}
	f.Fuzz(func(t *testing.T, raw []byte) { sameAsTwoPass(t, raw) })
}

// TestOnePassTakesTheGoldens: every golden input the decoder accepts is
// read by the one pass, every resource of it (else the comparison above
// would only ever compare the two passes with themselves, and the decoder
// would be as slow as before).
func TestOnePassTakesTheGoldens(t *testing.T) {
	schemaOfType := map[string]*jsonSchema{"Observation": obsSchema, "Patient": patientSchema,
		"Specimen": specimenSchema, "Bundle": bundleSchema, "Goal": goalSchema}
	taken := 0
	for name, raw := range decodeInputs(t) {
		if _, err := Decode(raw, nil); err != nil {
			continue
		}
		raw = bytes.TrimSpace(raw)
		rt := peekResourceType(raw)
		s := schemaOfType[rt]
		v := newOf(s)
		if !fillStrict(raw, s, v) {
			t.Errorf("%s: the one pass gave up on the %s", name, rt)
			continue
		}
		taken++
		if b, ok := v.(*bundleJSON); ok {
			for i, en := range b.Entry {
				if es := schemaOfType[peekResourceType(en.Resource)]; es != nil && !fillStrict(en.Resource, es, newOf(es)) {
					t.Errorf("%s: the one pass gave up on entry %d", name, i)
				}
			}
		}
	}
	if taken < 30 {
		t.Fatalf("only %d accepted golden inputs", taken)
	}
}

// mutations are the bytes written over, or put before, one byte of an
// input: JSON's structure and the characters the one pass treats apart.
var mutations = [][]byte{
	[]byte(" "), []byte("\""), []byte("\\"), []byte("n"), []byte("0"), []byte("-"), []byte("."),
	[]byte("e"), []byte(","), []byte(":"), []byte("}"), []byte("]"), []byte("{"), []byte("["),
	[]byte("x"), []byte("_"), []byte("\x7f"), []byte("\x1f"), []byte("é"), []byte("\\u0041"),
	[]byte("\\ud800"), []byte("1e400"), []byte("null"), []byte("true"), []byte("\t"), {},
}

// TestDecodeSameAsTwoPassMutations: many inputs near the goldens', each a
// golden input with one byte replaced, removed or preceded by another
// (every 5th byte, the mutation turning with the position), decoded both
// ways. The one pass must both accept and give up on some of them, so that
// both of its outcomes are compared.
func TestDecodeSameAsTwoPassMutations(t *testing.T) {
	inputs := decodeInputs(t)
	names := make([]string, 0, len(inputs))
	for name := range inputs {
		names = append(names, name)
	}
	sort.Strings(names)
	tried, accepted := 0, 0
	for k, name := range names {
		raw := inputs[name]
		for pos := k % 5; pos < len(raw); pos += 5 {
			m := mutations[(pos/5+k)%len(mutations)]
			over := slices.Concat(raw[:pos], m, raw[pos+1:])
			before := slices.Concat(raw[:pos], m, raw[pos:])
			for _, in := range [][]byte{over, before} {
				tried++
				if sameAsTwoPass(t, in) > 0 {
					accepted++
				}
			}
		}
	}
	t.Logf("%d mutated inputs, %d accepted by the one pass for some schema", tried, accepted)
	if accepted < tried/20 || accepted == tried {
		t.Fatalf("the one pass accepted %d of %d mutated inputs: both outcomes must be exercised", accepted, tried)
	}
}

// TestFillEveryField: for every field the five resource schemas reach
// (down to a few levels of nesting), a document that sets it, decoded by
// the one pass and by encoding/json (through the two passes): the one pass
// must accept each document and store every field where encoding/json
// does. One document per variant of the choice elements (value[x],
// effective[x], ...), so each variant is set in one of them.
func TestFillEveryField(t *testing.T) {
	for _, fs := range fillSchemas {
		for variant := range maxChoice(fs.schema, 0) {
			g := docGen{variant: variant}
			doc := g.object(fs.schema, 0)
			if !json.Valid(doc) {
				t.Fatalf("%s: generated invalid JSON: %s", fs.name, clip(doc))
			}
			one, two := newOf(fs.schema), newOf(fs.schema)
			if !fillStrict(doc, fs.schema, one) {
				t.Fatalf("%s variant %d: the one pass gave up on a document of known fields: %s", fs.name, variant, clip(doc))
			}
			if de := strictUnmarshalTwoPass(doc, fs.schema, fs.name, -1, two); de != nil {
				t.Fatalf("%s variant %d: two passes refuse the generated document: %v", fs.name, variant, de)
			}
			if !reflect.DeepEqual(one, two) {
				t.Fatalf("%s variant %d: the one pass filled another value than encoding/json", fs.name, variant)
			}
			// Every field was set: the zero value is not what came out.
			if reflect.ValueOf(one).Elem().IsZero() {
				t.Fatalf("%s: nothing filled", fs.name)
			}
		}
		if n := countFields(fs.schema, 0); n < 20 {
			t.Fatalf("%s: only %d fields generated", fs.name, n)
		}
	}
}

// countFields counts the fields a generated document of s holds (every
// variant's, nested down to docMaxDepth).
func countFields(s *jsonSchema, depth int) int {
	n := len(s.fields)
	if depth < docMaxDepth {
		for _, f := range s.fields {
			if f.kind == jkObject {
				n += countFields(f.obj, depth+1)
			}
		}
	}
	return n
}

// maxChoice is the most variants a choice element of s has, nested down to
// docMaxDepth.
func maxChoice(s *jsonSchema, depth int) int {
	n := 1
	groups := map[string]int{}
	for _, f := range s.fields {
		if f.choice != "" {
			groups[f.choice]++
			n = max(n, groups[f.choice])
		}
		if f.kind == jkObject && depth < docMaxDepth {
			n = max(n, maxChoice(f.obj, depth+1))
		}
	}
	return n
}

// docGen writes a JSON document setting every field of a schema.
type docGen struct {
	variant int
	n       int
}

const docMaxDepth = 3

func (g *docGen) object(s *jsonSchema, depth int) []byte {
	names := make([]string, 0, len(s.fields))
	for name := range s.fields {
		names = append(names, name)
	}
	sort.Strings(names)
	// One member of each choice element, picked by the variant.
	choices := map[string][]string{}
	for _, name := range names {
		if c := s.fields[name].choice; c != "" {
			choices[c] = append(choices[c], name)
		}
	}
	var b bytes.Buffer
	b.WriteByte('{')
	first := true
	for _, name := range names {
		f := s.fields[name]
		if f.choice != "" {
			members := choices[f.choice]
			if members[g.variant%len(members)] != name {
				continue
			}
		}
		if f.kind == jkObject && depth >= docMaxDepth {
			continue
		}
		if !first {
			b.WriteByte(',')
		}
		first = false
		b.WriteString(`"` + name + `":`)
		if f.array {
			b.WriteByte('[')
			b.Write(g.value(f, depth))
			if f.kind != jkObject {
				b.WriteString(", ")
				b.Write(g.value(f, depth))
			}
			b.WriteByte(']')
		} else {
			b.Write(g.value(f, depth))
		}
	}
	b.WriteByte('}')
	return b.Bytes()
}

func (g *docGen) value(f *jsonField, depth int) []byte {
	g.n++
	switch f.kind {
	case jkObject:
		return g.object(f.obj, depth+1)
	case jkString:
		// Plain strings, and some with escapes and non-ASCII text.
		switch g.n % 3 {
		case 0:
			return []byte(`"s"`)
		case 1:
			return []byte(`"a\u00e9\n\"b\" 37 °C"`)
		}
		return []byte(`"2026-12-04T01:02:03+01:00"`)
	case jkBool:
		if g.n%2 == 0 {
			return []byte("true")
		}
		return []byte("false")
	case jkInt:
		return []byte("-7")
	case jkNumber:
		return []byte("12.50e-1")
	case jkEnum:
		// The first code of the element's value set (its Code method;
		// json.Marshal would write "<" as \u003c, which the FHIR library's
		// UnmarshalJSON does not read).
		code := reflect.New(f.enum).Elem().MethodByName("Code").Call(nil)[0].String()
		return []byte(`"` + code + `"`)
	}
	return []byte(`{"resourceType":"Basic","id":"x","n":[1,2.5,null,true,{"a":[]}]}`)
}

// edgeObs is a valid Observation with its last member replaced by tail and
// its value by value.
func edgeObs(value, tail string) []byte {
	return []byte(`{"resourceType":"Observation","id":"e1","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},` +
		`"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2026-11-20T08:15:00+01:00",` +
		`"valueQuantity":{"value":` + value + `,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}` + tail + `}`)
}

// edgeBundle is a batch Bundle with the given entries.
func edgeBundle(entries string) []byte {
	return []byte(`{"resourceType":"Bundle","type":"batch","entry":[` + entries + `]}`)
}

// nestedKnown is an extension nested n levels deep (each an array and an
// object) ending in inner: known fields only.
func nestedKnown(n int, inner string) string {
	return `,"extension":` + strings.Repeat(`[{"url":"u","extension":`, n-1) + `[{"url":"u",` + inner + `}]` + strings.Repeat(`}]`, n-1)
}

// deepRaw is a contained resource nesting objects k levels deep.
func deepRaw(k int) string {
	return `,"contained":[` + strings.Repeat(`{"a":`, k-1) + `{"resourceType":"Basic"}` + strings.Repeat(`}`, k-1) + `]`
}

// edgeInputs are inputs at each rule of the strict pass and of JSON's
// syntax, where the one pass must give up exactly as often as needed.
func edgeInputs() [][]byte {
	var out [][]byte
	for _, v := range []string{`46.2`, `1e400`, `-1e400`, `01`, `1.`, `.5`, `-0`, `-`, `1E+2`, `1e-2`, `2e`, `"46.2"`, `true`, `null`, `[46.2]`, `{}`, `46.2 `, `4 6`, `0x1`, `1.5.5`} {
		out = append(out, edgeObs(v, ""))
	}
	comp := func(value string) string {
		return `,"component":[{"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},` + value + `}]`
	}
	for _, tail := range []string{
		``, `,"contained":null`, `,"contained":[null]`, `,"contained":{}`, `,"contained":[[1]]`, `,"contained":[1]`,
		`,"contained":["x"]`, `,"contained":[]`, `,"contained":[{"resourceType":"Specimen","id":"s","x":null}]`,
		`,"status":"final"`, `,"valueString":"x"`, `,"\u0069d":"e2"`, `,"\u0069ssued":"2026-11-20T08:15:00+01:00"`, `,"_status":{}`, `,"Status":"final"`, `,"":1`,
		`,"issued":null`, `,"issued":["x"]`, `,"issued":1`, `,"issued":"2026-11-20T08:15:00+01:00"`,
		`,"category":[]`, `,"category":{}`, `,"category":[{}]`, `,"category":[{},]`, `,"category":[,{}]`, `,"category":[{}{}]`,
		`,"bodySite":{}`, `,"bodySite":{"coding":[{"code":"x"},{"code":"y"}],"text":"t"}`,
		comp(`"valueInteger":2147483647`), comp(`"valueInteger":2147483648`), comp(`"valueInteger":-2147483649`),
		comp(`"valueInteger":1.0`), comp(`"valueInteger":1e2`), comp(`"valueInteger":-0`), comp(`"valueInteger":"1"`),
		comp(`"valueBoolean":true`), comp(`"valueBoolean":false`), comp(`"valueBoolean":tru`), comp(`"valueBoolean":True`),
		comp(`"valueBoolean":1`), comp(`"valueBoolean":truex`), comp(`"valueString":"a","valueBoolean":true`),
		comp(`"valueString":"a\u0000b"`), comp(`"valueString":"a\tb"`), comp("\"valueString\":\"a\tb\""),
		comp(`"valueString":"\ud800"`), comp(`"valueString":"\uD83D\uDE00 é"`), comp(`"valueString":"a\/b\\"`),
		comp(`"valueString":"a\qb"`), comp(`"valueString":"a\u12"`), comp(`"valueString":"` + "\x7f" + `"`),
		comp(`"interpretation":[{"coding":[{"system":"s","code":"H"}]}]`),
		nestedKnown(31, `"valueCodeableConcept":{"text":"x"}`),    // 64 levels: accepted
		nestedKnown(31, `"valueCodeableConcept":{"coding":[]}`),   // 65 levels: too deep
		nestedKnown(31, `"valueCodeableConcept":{"coding":null}`), // null at 65
		nestedKnown(30, `"valueCodeableConcept":{"coding":[{}]}`), // 65 levels
		deepRaw(62), deepRaw(63), deepRaw(5000),
	} {
		out = append(out, edgeObs(`46.2`, tail))
	}
	for _, status := range []string{`"final"`, `"fin\u0061l"`, `"FINAL"`, `"final "`, `1`, `"\"final\""`, `"cancelled"`, `""`} {
		out = append(out, bytes.Replace(edgeObs(`46.2`, ""), []byte(`"final"`), []byte(status), 1))
	}
	obs := string(edgeObs(`46.2`, ""))
	for _, s := range []string{obs + ` `, obs + `x`, obs + `}`, obs + `{}`, " \n\t" + obs, obs[:len(obs)-1], obs + obs} {
		out = append(out, []byte(s))
	}
	for _, entries := range []string{
		`{"fullUrl":"urn:uuid:00000000-0000-4000-8000-000000000001","resource":` + obs + `}`,
		`{"resource":` + string(edgeObs(`46.2`, deepRaw(58))) + `}`, // 64 levels in the Bundle
		`{"resource":` + string(edgeObs(`46.2`, deepRaw(59))) + `}`, // 65 levels in the Bundle, 62 in the entry
		`{"resource":null}`, `{"resource":[` + obs + `]}`, `{"resource":"x"}`, `{"resource":{}}`, `{"resource":1}`,
		`{"fullUrl":null,"resource":` + obs + `}`, `{"request":{"method":"DELETE","url":"Observation/x"}}`,
		`{"resource":` + obs + `},{"resource":` + obs + `}`, `{"resource":` + obs + `,"resource":` + obs + `}`,
		`{"resource":{"resourceType":"Specimen","id":"s1","type":{"coding":[{"system":"http://snomed.info/sct","code":"122552005"}]}}},{"resource":` + obs + `}`,
		`{"resource":{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1970-01-01"}},{"resource":` + obs + `}`,
		`{"resource":{"resourceType":"Patient","id":"p1","gender":"femal"}}`,
	} {
		out = append(out, edgeBundle(entries))
	}
	for _, b := range []string{`{"resourceType":"Bundle","type":"batch","entry":[]}`, `{"resourceType":"Bundle","type":"batch","entry":{}}`,
		`{"resourceType":"Bundle","type":"Batch","entry":[{"resource":` + obs + `}]}`, `{"resourceType":"Bundle","entry":[{"resource":` + obs + `}]}`} {
		out = append(out, []byte(b))
	}
	return out
}

// TestDecodeSameAsTwoPassEdges: the edge inputs decode alike both ways, and
// the one pass takes the valid ones up to MaxNestingDepth and gives up past
// it.
func TestDecodeSameAsTwoPassEdges(t *testing.T) {
	accepted := 0
	for _, in := range edgeInputs() {
		if sameAsTwoPass(t, in) > 0 {
			accepted++
		}
	}
	if accepted < 20 {
		t.Errorf("the one pass accepted only %d edge inputs", accepted)
	}
	for _, c := range []struct {
		in   []byte
		want bool
	}{
		{edgeObs(`46.2`, nestedKnown(31, `"valueCodeableConcept":{"text":"x"}`)), true},
		{edgeObs(`46.2`, nestedKnown(31, `"valueCodeableConcept":{"coding":[]}`)), false},
		{edgeObs(`46.2`, deepRaw(62)), true},
		{edgeObs(`46.2`, deepRaw(63)), false},
	} {
		if got := fillStrict(c.in, obsSchema, newOf(obsSchema)); got != c.want {
			t.Errorf("one pass on %d bytes nested: accepted %v, want %v", len(c.in), got, c.want)
		}
	}
}

// TestSpecialIn: the eight-byte test against the byte table, for every
// byte value at every position of words otherwise plain or random.
func TestSpecialIn(t *testing.T) {
	ref := func(w uint64) bool {
		for k := range 8 {
			if !plainByte[byte(w>>(8*k))] {
				return true
			}
		}
		return false
	}
	x := uint64(0x9e3779b97f4a7c15)
	for c := range 256 {
		for k := range 8 {
			for _, base := range []uint64{0x6161616161616161, 0x2020202020202020, 0x7f7f7f7f7f7f7f7f, x} {
				w := base&^(0xff<<(8*k)) | uint64(c)<<(8*k)
				if specialIn(w) != ref(w) {
					t.Fatalf("specialIn(%#x) = %v", w, specialIn(w))
				}
			}
			x ^= x << 13
			x ^= x >> 7
			x ^= x << 17
		}
	}
}

// TestDecodeNilWhenNothing: a Bundle that yields no fact leaves Facts and
// Resources nil, as before the decoder made room for them ahead.
func TestDecodeNilWhenNothing(t *testing.T) {
	unknown := bytes.Replace(edgeObs(`46.2`, ""), []byte(`"2019-8"`), []byte(`"0000-0"`), 1)
	d, err := Decode(edgeBundle(`{"resource":`+string(unknown)+`}`), nil)
	if err != nil {
		t.Fatal(err)
	}
	if d.Facts != nil || d.Resources != nil || len(d.Ignored) != 1 {
		t.Fatalf("got facts %#v, resources %#v, ignored %v", d.Facts, d.Resources, d.Ignored)
	}
}
