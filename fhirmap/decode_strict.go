package fhirmap

// The strict pass. encoding/json, and so the FHIR model structs, ignore
// unknown fields, accept a JSON string for a decimal, let a repeated key
// silently override the first and never see FHIR's one-of rule for
// value[x]. Before a resource is handed to the model structs, this pass
// walks its bytes once against a schema taken from the same structs (by
// reflection, built once per type) and refuses, naming the field:
//
//   - a key the struct does not have ("unknown-field"),
//   - a primitive extension "_field" ("unsupported-extension"),
//   - a key given twice, or two variants of one choice element such as
//     valueQuantity and valueString ("duplicate-value"),
//   - null, or a JSON type the element cannot hold ("malformed-json"),
//   - an invalid code for a coded element such as status ("malformed-json"),
//   - objects and arrays nested deeper than MaxNestingDepth ("too-deep"):
//     FHIR's recursive types (extension in extension) would otherwise let a
//     small message carry a field path of any length into logs and headers.
//
// The pass does not validate JSON syntax (encoding/json does, right after;
// scanning twice would cost a sixth of the decode time), but it is safe on
// any input: it never reads out of bounds and always advances or stops.
// When it refuses, the caller first checks the syntax, so that malformed
// JSON is always reported as such.
//
// Most resources never reach this pass: the one-pass decoder
// (decode_fill.go) reads them, on the same schema, and leaves to this pass
// and encoding/json only what it cannot show they would accept alike.

import (
	"encoding/json"
	"reflect"
	"strconv"
	"strings"
	"sync"
	"unicode/utf8"
)

type jsonKind uint8

const (
	jkString jsonKind = iota // string and *string
	jkBool
	jkInt
	jkNumber // json.Number: FHIR decimal, must be a JSON number
	jkEnum   // a coded element with its own UnmarshalJSON
	jkObject
	jkRaw // json.RawMessage: any JSON value, read later
)

type jsonField struct {
	name   string
	kind   jsonKind
	array  bool
	obj    *jsonSchema  // jkObject
	enum   reflect.Type // jkEnum: the element type
	choice string       // the choice element name (e.g. "value"), or ""

	mu     sync.RWMutex     // guards codes and values
	codes  map[string]bool  // jkEnum: quoted codes known to be valid
	values map[string]int64 // jkEnum: quoted valid codes and the value each stands for (codeValue)

	fill fillInfo // where and how the one-pass decoder (decode_fill.go) stores the value
}

// validCode reports whether quoted is a valid JSON code for the enum type
// of f, asking the type's own UnmarshalJSON. Valid codes are remembered
// (at most the size of the code list); invalid ones are not, so hostile
// input cannot grow the cache.
func (f *jsonField) validCode(quoted []byte) bool {
	f.mu.RLock()
	ok := f.codes[string(quoted)]
	f.mu.RUnlock()
	if ok {
		return true
	}
	v := reflect.New(f.enum).Interface().(json.Unmarshaler)
	if v.UnmarshalJSON(quoted) != nil {
		return false
	}
	f.mu.Lock()
	if f.codes == nil {
		f.codes = map[string]bool{}
	}
	f.codes[string(quoted)] = true
	f.mu.Unlock()
	return true
}

type jsonSchema struct {
	typ    reflect.Type
	fields map[string]*jsonField
}

var (
	schemaMu    sync.Mutex
	schemaCache = map[reflect.Type]*jsonSchema{}
	numberType  = reflect.TypeFor[json.Number]()
	rawType     = reflect.TypeFor[json.RawMessage]()
	unmarshaler = reflect.TypeFor[json.Unmarshaler]()
)

// schemaOf returns the schema of struct type t, building it once.
func schemaOf(t reflect.Type) *jsonSchema {
	schemaMu.Lock()
	defer schemaMu.Unlock()
	return buildSchema(t)
}

func buildSchema(t reflect.Type) *jsonSchema {
	if s, ok := schemaCache[t]; ok {
		return s
	}
	s := &jsonSchema{typ: t, fields: map[string]*jsonField{}}
	schemaCache[t] = s // before recursing: FHIR types are recursive
	addFields(s, t, nil)
	markChoices(s)
	return s
}

// addFields adds the JSON fields of struct t; a field of the outer struct
// shadows a promoted field of the same name, as in encoding/json.
func addFields(s *jsonSchema, t reflect.Type, index []int) {
	type embed struct {
		t     reflect.Type
		index []int
		ptr   bool
	}
	var embedded []embed
	for i := 0; i < t.NumField(); i++ {
		sf := t.Field(i)
		if sf.Anonymous {
			et := sf.Type
			ptr := et.Kind() == reflect.Pointer
			if ptr {
				et = et.Elem()
			}
			embedded = append(embedded, embed{t: et, index: append(append([]int(nil), index...), i), ptr: ptr})
			continue
		}
		if !sf.IsExported() {
			continue
		}
		name, _, _ := strings.Cut(sf.Tag.Get("json"), ",")
		if name == "-" {
			continue
		}
		if name == "" {
			name = sf.Name
		}
		f := newJSONField(name, sf.Type)
		f.fill = newFillInfo(f, sf.Type, append(append([]int(nil), index...), i))
		s.fields[name] = f
	}
	for _, et := range embedded {
		inner := &jsonSchema{fields: map[string]*jsonField{}}
		addFields(inner, et.t, et.index)
		for name, f := range inner.fields {
			if et.ptr {
				f.fill.ok = false // a pointer to an embedded struct: left to encoding/json
			}
			if _, shadowed := s.fields[name]; !shadowed {
				s.fields[name] = f
			}
		}
	}
}

func newJSONField(name string, t reflect.Type) *jsonField {
	f := &jsonField{name: name}
	if t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	if t.Kind() == reflect.Slice && t != rawType {
		f.array = true
		t = t.Elem()
		if t.Kind() == reflect.Pointer {
			t = t.Elem()
		}
	}
	switch {
	case t == rawType:
		f.kind = jkRaw
	case t == numberType:
		f.kind = jkNumber
	case reflect.PointerTo(t).Implements(unmarshaler):
		f.kind, f.enum = jkEnum, t
	case t.Kind() == reflect.String:
		f.kind = jkString
	case t.Kind() == reflect.Bool:
		f.kind = jkBool
	case t.Kind() >= reflect.Int && t.Kind() <= reflect.Uint64:
		f.kind = jkInt
	case t.Kind() == reflect.Struct:
		f.kind, f.obj = jkObject, buildSchema(t)
	default:
		f.kind = jkRaw
	}
	return f
}

// fhirTypeSuffixes are the FHIR data type names that end a choice element's
// JSON name (valueQuantity, effectiveDateTime, deceasedBoolean, ...).
var fhirTypeSuffixes = []string{
	"Address", "Age", "Annotation", "Attachment", "Base64Binary", "Boolean", "Canonical", "Code",
	"CodeableConcept", "Coding", "ContactDetail", "ContactPoint", "Contributor", "Count",
	"DataRequirement", "Date", "DateTime", "Decimal", "Distance", "Dosage", "Duration", "Expression",
	"HumanName", "Id", "Identifier", "Instant", "Integer", "Markdown", "Meta", "Money", "Oid",
	"ParameterDefinition", "Period", "PositiveInt", "Quantity", "Range", "Ratio", "Reference",
	"RelatedArtifact", "SampledData", "Signature", "String", "Time", "Timing", "TriggerDefinition",
	"UnsignedInt", "Uri", "Url", "UsageContext", "Uuid",
}

// markChoices finds choice elements: two or more fields named prefix + a
// FHIR type name share the prefix, and at most one of them may appear.
func markChoices(s *jsonSchema) {
	groups := map[string][]*jsonField{}
	for name, f := range s.fields {
		best := ""
		for _, suf := range fhirTypeSuffixes {
			if len(suf) > len(best) && len(name) > len(suf) && strings.HasSuffix(name, suf) {
				best = suf
			}
		}
		if best == "" {
			continue
		}
		prefix := name[:len(name)-len(best)]
		groups[prefix] = append(groups[prefix], f)
	}
	for prefix, fs := range groups {
		if len(fs) < 2 {
			continue
		}
		for _, f := range fs {
			f.choice = prefix
		}
	}
}

// pathSeg is one step of a FHIRPath-like location: a field name, or an
// array index when name is "".
type pathSeg struct {
	name string
	idx  int
}

// walker checks one JSON value against a schema.
type walker struct {
	data  []byte
	pos   int
	root  string    // e.g. "Observation" or "Bundle.entry[2].resource"
	path  []pathSeg // below root
	depth int       // objects and arrays open at w.pos
	err   *DecodeError
}

// MaxNestingDepth bounds how deeply objects and arrays may nest in one
// message, counting both (a Bundle entry's Observation with a coded
// component holding an extension is about 12 deep). Deeper input is refused
// as "too-deep".
const MaxNestingDepth = 64

// MaxFieldPath bounds DecodeError.Field in bytes: a longer path keeps its
// start and its end with "..." between them.
const MaxFieldPath = 240

// enter opens one level of nesting, refusing input nested too deeply.
func (w *walker) enter() bool {
	if w.depth++; w.depth > MaxNestingDepth {
		return w.fail("too-deep", "", "objects and arrays nested deeper than "+strconv.Itoa(MaxNestingDepth)+" levels")
	}
	return true
}

func (w *walker) where(extra string) string {
	return shortenPath(w.path0(extra))
}

// shortenPath cuts a field path longer than MaxFieldPath in the middle.
func shortenPath(p string) string {
	if len(p) <= MaxFieldPath {
		return p
	}
	const ellipsis = "..."
	head := (MaxFieldPath - len(ellipsis)) / 3
	tail := MaxFieldPath - len(ellipsis) - head
	return p[:head] + ellipsis + p[len(p)-tail:]
}

func (w *walker) path0(extra string) string {
	var b strings.Builder
	b.WriteString(w.root)
	for _, s := range w.path {
		if s.name == "" {
			b.WriteByte('[')
			b.WriteString(strconv.Itoa(s.idx))
			b.WriteByte(']')
			continue
		}
		b.WriteByte('.')
		b.WriteString(s.name)
	}
	if extra != "" {
		b.WriteByte('.')
		b.WriteString(extra)
	}
	return b.String()
}

func (w *walker) fail(reason, extra, detail string) bool {
	if w.err == nil {
		w.err = &DecodeError{Entry: -1, Field: w.where(extra), Reason: reason, Detail: detail}
	}
	return false
}

// checkStrict walks data, a JSON object, against s. root names it in errors.
func checkStrict(data []byte, s *jsonSchema, root string) *DecodeError {
	w := walker{data: data, root: root, path: make([]pathSeg, 0, 8)}
	w.ws()
	if w.peek() != '{' {
		w.fail("malformed-json", "", "expected a JSON object")
		return w.err
	}
	w.object(s)
	return w.err
}

// peek returns the byte at w.pos, 0 at the end of the input.
func (w *walker) peek() byte {
	if w.pos < len(w.data) {
		return w.data[w.pos]
	}
	return 0
}

func (w *walker) eof() bool { return w.fail("malformed-json", "", "unexpected end of JSON") }

func (w *walker) ws() {
	for w.pos < len(w.data) {
		switch w.data[w.pos] {
		case ' ', '\t', '\n', '\r':
			w.pos++
		default:
			return
		}
	}
}

// object walks an object; w.pos is at '{'.
func (w *walker) object(s *jsonSchema) bool {
	if !w.enter() {
		return false
	}
	ok := w.members(s)
	w.depth--
	return ok
}

// members walks the members of an object; w.pos is at '{'.
func (w *walker) members(s *jsonSchema) bool {
	w.pos++
	var seenBuf [24]*jsonField
	seen := seenBuf[:0]
	for {
		w.ws()
		switch w.peek() {
		case 0:
			return w.eof()
		case '}':
			w.pos++
			return true
		case ',':
			w.pos++
			w.ws()
		}
		key, ok := w.key()
		if !ok {
			return false
		}
		w.ws()
		if w.peek() != ':' {
			return w.fail("malformed-json", "", "expected a colon after a key")
		}
		w.pos++
		w.ws()
		if w.peek() == 0 {
			return w.eof()
		}
		f := s.fields[string(key)]
		if f == nil {
			name := quoteShort(string(key))
			if len(key) > 0 && key[0] == '_' {
				return w.fail("unsupported-extension", safeName(key), "primitive extension "+name+" is not supported")
			}
			return w.fail("unknown-field", safeName(key), "unknown field "+name)
		}
		for _, g := range seen {
			if g == f {
				return w.fail("duplicate-value", f.name, "field given twice")
			}
			if f.choice != "" && g.choice == f.choice {
				return w.fail("duplicate-value", f.name, "only one of "+f.choice+"[x] is allowed; "+g.name+" is also given")
			}
		}
		seen = append(seen, f)
		w.path = append(w.path, pathSeg{name: f.name})
		if !w.value(f) {
			return false
		}
		w.path = w.path[:len(w.path)-1]
	}
}

// safeName returns key for use in a field path: printable ASCII only,
// bounded, so that a hostile key cannot carry data into logs.
func safeName(key []byte) string {
	const max = 40
	var b strings.Builder
	for i, c := range key {
		if i == max {
			b.WriteString("...")
			break
		}
		if c < 0x21 || c > 0x7e || c == '"' || c == '\\' {
			b.WriteByte('?')
			continue
		}
		b.WriteByte(c)
	}
	return b.String()
}

// key reads an object key; w.pos is at '"'. Keys with escapes are
// unescaped (a FHIR key never needs one, but "\u0076alue" is "value").
func (w *walker) key() ([]byte, bool) {
	if w.peek() != '"' {
		return nil, w.fail("malformed-json", "", "expected an object key")
	}
	start := w.pos + 1
	end, escaped, ok := w.skipString()
	if !ok {
		return nil, w.eof()
	}
	raw := w.data[start : end-1]
	if !escaped {
		return raw, true
	}
	var s string
	if err := json.Unmarshal(w.data[start-1:end], &s); err != nil || !utf8.ValidString(s) {
		return nil, w.fail("malformed-json", "", "bad object key")
	}
	return []byte(s), true
}

// value walks the value of field f.
func (w *walker) value(f *jsonField) bool {
	c := w.peek()
	if c == 'n' {
		return w.fail("malformed-json", "", "null is not allowed in FHIR JSON")
	}
	if !f.array {
		if c == '[' {
			return w.fail("malformed-json", "", "expected a single value, not an array")
		}
		return w.single(f)
	}
	if c != '[' {
		return w.fail("malformed-json", "", "expected an array")
	}
	if !w.enter() {
		return false
	}
	ok := w.elements(f)
	w.depth--
	return ok
}

// elements walks the elements of an array of field f; w.pos is at '['.
func (w *walker) elements(f *jsonField) bool {
	w.pos++
	for i := 0; ; i++ {
		w.ws()
		switch w.peek() {
		case 0:
			return w.eof()
		case ']':
			w.pos++
			return true
		case ',':
			w.pos++
			w.ws()
		}
		w.path = append(w.path, pathSeg{idx: i})
		if w.peek() == 'n' {
			return w.fail("malformed-json", "", "null is not allowed in FHIR JSON")
		}
		if !w.single(f) {
			return false
		}
		w.path = w.path[:len(w.path)-1]
	}
}

// single walks one (non-array) value of field f.
func (w *walker) single(f *jsonField) bool {
	c := w.peek()
	switch f.kind {
	case jkObject:
		if c != '{' {
			return w.fail("malformed-json", "", "expected an object")
		}
		return w.object(f.obj)
	case jkString:
		if c != '"' {
			return w.fail("malformed-json", "", "expected a string")
		}
		if _, _, ok := w.skipString(); !ok {
			return w.eof()
		}
		return true
	case jkEnum:
		if c != '"' {
			return w.fail("malformed-json", "", "expected a code")
		}
		start := w.pos
		end, _, ok := w.skipString()
		if !ok {
			return w.eof()
		}
		if !f.validCode(w.data[start:end]) {
			return w.fail("malformed-json", "", "not a valid code for this element")
		}
		return true
	case jkBool:
		if c != 't' && c != 'f' {
			return w.fail("malformed-json", "", "expected true or false")
		}
		w.skipLiteral()
		return true
	case jkNumber, jkInt:
		if c != '-' && (c < '0' || c > '9') {
			return w.fail("malformed-json", "", "expected a JSON number")
		}
		start := w.pos
		w.skipLiteral()
		if f.kind == jkInt {
			if _, err := strconv.ParseInt(string(w.data[start:w.pos]), 10, 32); err != nil {
				return w.fail("malformed-json", "", "expected an integer")
			}
		}
		return true
	default: // jkRaw
		if !w.skipValue() {
			return w.fail("malformed-json", "", "expected a value")
		}
		return true
	}
}

// skipString moves past a string starting at w.pos ('"') and returns the
// position after the closing quote, whether it held escapes, and false if
// the input ended first.
func (w *walker) skipString() (int, bool, bool) {
	escaped := false
	i := w.pos + 1
	for i < len(w.data) {
		switch w.data[i] {
		case '\\':
			escaped = true
			i += 2
			continue
		case '"':
			w.pos = i + 1
			return w.pos, escaped, true
		}
		i++
	}
	w.pos = len(w.data)
	return w.pos, escaped, false
}

// skipLiteral moves past a number, true or false.
func (w *walker) skipLiteral() {
	for w.pos < len(w.data) {
		switch w.data[w.pos] {
		case ',', '}', ']', ' ', '\t', '\n', '\r':
			return
		}
		w.pos++
	}
}

// skipValue moves past any JSON value; it reports false when it could not
// advance (a stray delimiter or the end of the input) or when the value
// nests deeper than MaxNestingDepth (w.err then says "too-deep").
func (w *walker) skipValue() bool {
	start := w.pos
	switch w.peek() {
	case 0:
		return false
	case '"':
		w.skipString()
	case '{', '[':
		depth := 0
		for w.pos < len(w.data) {
			switch w.data[w.pos] {
			case '"':
				w.skipString()
				continue
			case '{', '[':
				if depth++; w.depth+depth > MaxNestingDepth {
					w.fail("too-deep", "", "objects and arrays nested deeper than "+strconv.Itoa(MaxNestingDepth)+" levels")
					return false
				}
			case '}', ']':
				depth--
				if depth == 0 {
					w.pos++
					return true
				}
			}
			w.pos++
		}
	default:
		w.skipLiteral()
	}
	return w.pos > start
}

// peekResourceType returns the top-level "resourceType" string of a JSON
// object, "" when absent, not a string, or the input is not an object.
func peekResourceType(data []byte) string { return peekTopString(data, "resourceType") }

// peekTopString returns the top-level string member key of a JSON object,
// "" when absent or not a string. Safe on any input.
func peekTopString(data []byte, key string) string {
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
			f := filler{data: data, pos: start}
			if end, plain := f.str(); end >= 0 && plain {
				return string(data[start+1 : end-1]) // what json.Unmarshal gives for a plain string
			}
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
