package fhirmap

// The one-pass decoder. strictUnmarshal used to walk a resource's bytes
// three times: the strict pass (decode_strict.go), encoding/json's syntax
// check of the whole input, and encoding/json's reflective fill; a Bundle's
// entries were walked twice more, as the Bundle's json.RawMessage values.
// fillStrict does all three in one walk, on the same schema: it checks the
// syntax as encoding/json's scanner does, applies the strict pass's rules
// and stores each value where encoding/json would.
//
// It never refuses anything itself. It accepts an input only when the
// two-pass path would accept it too and fill the same struct with the same
// values; on anything else (a syntax error, an unknown or repeated field, a
// null, a wrong JSON type, an invalid code, nesting beyond MaxNestingDepth,
// an escaped key, or a field of a Go type it does not store) it gives up,
// and strictUnmarshal runs the two-pass path from a zero value, so every
// refusal, its reason, field and detail, comes from the same code as
// before. FuzzDecodeSameAsTwoPass and TestFillEveryField check this.

import (
	"encoding/binary"
	"encoding/json"
	"reflect"
	"strconv"
)

// fillInfo says where the one-pass decoder stores a field and whether it
// can.
type fillInfo struct {
	ok    bool         // fillStrict can store this field (else it gives up on the resource)
	index []int        // the field within its struct, through embedded structs
	ptr   bool         // the field is a pointer (not for arrays: their elements are values)
	elem  reflect.Type // the type of one value: the field's type without pointer and slice
	slice reflect.Type // arrays: the slice type
	str   bool         // a *string (taken from the filler's slab)
}

var stringType = reflect.TypeFor[string]()

func newFillInfo(f *jsonField, t reflect.Type, index []int) fillInfo {
	fi := fillInfo{index: index}
	if t.Kind() == reflect.Pointer {
		fi.ptr = true
		t = t.Elem()
	}
	if f.array {
		if fi.ptr || t.Kind() != reflect.Slice {
			return fi // a pointer to a slice: not stored here
		}
		fi.slice = t
		t = t.Elem()
		if t.Kind() == reflect.Pointer {
			return fi // a slice of pointers: not stored here
		}
	}
	fi.elem = t
	fi.str = fi.ptr && t == stringType
	switch f.kind {
	case jkString, jkNumber:
		fi.ok = t.Kind() == reflect.String
	case jkBool:
		fi.ok = t.Kind() == reflect.Bool
	case jkInt, jkEnum:
		// jkInt values are checked to fit 32 bits, as the strict pass does.
		// An enum is stored as the integer its UnmarshalJSON sets.
		switch t.Kind() {
		case reflect.Int, reflect.Int32, reflect.Int64:
			fi.ok = f.kind == jkInt || t == f.enum
		}
	case jkObject:
		fi.ok = t.Kind() == reflect.Struct && f.obj != nil
	case jkRaw:
		fi.ok = t == rawType
	}
	return fi
}

// codeValue returns the integer an enum's UnmarshalJSON stores for quoted
// (a JSON string token exactly as in the input), false when it refuses the
// code. Valid codes are remembered, as in validCode.
func (f *jsonField) codeValue(quoted []byte) (int64, bool) {
	f.mu.RLock()
	n, ok := f.values[string(quoted)]
	f.mu.RUnlock()
	if ok {
		return n, true
	}
	p := reflect.New(f.enum)
	if p.Interface().(json.Unmarshaler).UnmarshalJSON(quoted) != nil {
		return 0, false
	}
	n = p.Elem().Int()
	f.mu.Lock()
	if f.values == nil {
		f.values = map[string]int64{}
	}
	f.values[string(quoted)] = n
	f.mu.Unlock()
	return n, true
}

// filler is one run of the one-pass decoder.
type filler struct {
	data  []byte
	pos   int
	depth int // objects and arrays open at pos, as walker.depth

	// strs holds the strings *string fields point to, a few allocated at
	// once instead of one each (the structs filled live only while their
	// message is decoded).
	strs []string
}

// newString returns a pointer to a new empty string.
func (f *filler) newString() *string {
	if len(f.strs) == 0 {
		f.strs = make([]string, 16)
	}
	p := &f.strs[0]
	f.strs = f.strs[1:]
	return p
}

// fillStrict decodes data, a JSON object, into v, a pointer to a zero value
// of s's struct type, and reports true, when it can show that the two-pass
// path (checkStrict, then json.Unmarshal) would accept data and store the
// same; else false, with v partly filled.
func fillStrict(data []byte, s *jsonSchema, v any) bool {
	rv := reflect.ValueOf(v)
	if rv.Kind() != reflect.Pointer || rv.Elem().Type() != s.typ {
		return false
	}
	f := filler{data: data}
	f.ws()
	if f.peek() != '{' || !f.object(s, rv.Elem()) {
		return false
	}
	f.ws()
	return f.pos == len(f.data) // json.Unmarshal refuses anything after the value
}

func (f *filler) peek() byte {
	if f.pos < len(f.data) {
		return f.data[f.pos]
	}
	return 0
}

func (f *filler) ws() {
	for f.pos < len(f.data) {
		switch f.data[f.pos] {
		case ' ', '\t', '\n', '\r':
			f.pos++
		default:
			return
		}
	}
}

// object reads an object of schema s into v; f.pos is at '{'.
func (f *filler) object(s *jsonSchema, v reflect.Value) bool {
	if f.depth++; f.depth > MaxNestingDepth {
		return false
	}
	f.pos++
	f.ws()
	if f.peek() == '}' {
		f.pos++
		f.depth--
		return true
	}
	var seenBuf [24]*jsonField
	seen := seenBuf[:0]
	for {
		if f.peek() != '"' {
			return false
		}
		start := f.pos + 1
		end, plain := f.str()
		if end < 0 || !plain {
			return false // an escaped key: the strict pass unescapes it
		}
		key := f.data[start : end-1]
		f.ws()
		if f.peek() != ':' {
			return false
		}
		f.pos++
		f.ws()
		jf := s.fields[string(key)]
		if jf == nil || !jf.fill.ok {
			return false
		}
		for _, g := range seen {
			if g == jf || jf.choice != "" && g.choice == jf.choice {
				return false
			}
		}
		seen = append(seen, jf)
		if !f.value(jf, v.FieldByIndex(jf.fill.index)) {
			return false
		}
		f.ws()
		switch f.peek() {
		case ',':
			f.pos++
			f.ws()
		case '}':
			f.pos++
			f.depth--
			return true
		default:
			return false
		}
	}
}

// value reads the value of field jf into fv, the field itself.
func (f *filler) value(jf *jsonField, fv reflect.Value) bool {
	c := f.peek()
	if !jf.array {
		if c == 'n' || c == '[' {
			return false
		}
		if jf.fill.str {
			if f.peek() != '"' {
				return false
			}
			p := f.newString()
			fv.Set(reflect.ValueOf(p))
			fv = reflect.ValueOf(p).Elem()
		} else if jf.fill.ptr {
			p := reflect.New(jf.fill.elem)
			fv.Set(p)
			fv = p.Elem()
		}
		return f.single(jf, fv)
	}
	if c != '[' {
		return false
	}
	if f.depth++; f.depth > MaxNestingDepth {
		return false
	}
	f.pos++
	f.ws()
	if f.peek() == ']' {
		f.pos++
		f.depth--
		fv.Set(reflect.MakeSlice(jf.fill.slice, 0, 0)) // as encoding/json: empty, not nil
		return true
	}
	for n := 0; ; n++ {
		if f.peek() == 'n' {
			return false
		}
		if n == fv.Cap() {
			fv.Grow(1)
		}
		fv.SetLen(n + 1)
		if !f.single(jf, fv.Index(n)) {
			return false
		}
		f.ws()
		switch f.peek() {
		case ',':
			f.pos++
			f.ws()
		case ']':
			f.pos++
			f.depth--
			return true
		default:
			return false
		}
	}
}

// single reads one value of field jf (not an array) into fv, of type
// jf.fill.elem.
func (f *filler) single(jf *jsonField, fv reflect.Value) bool {
	c := f.peek()
	switch jf.kind {
	case jkObject:
		if c != '{' {
			return false
		}
		return f.object(jf.obj, fv)
	case jkString:
		if c != '"' {
			return false
		}
		start := f.pos
		end, plain := f.str()
		if end < 0 {
			return false
		}
		if plain {
			fv.SetString(string(f.data[start+1 : end-1]))
			return true
		}
		// Escapes or non-ASCII bytes: encoding/json's own unquoting.
		var s string
		if json.Unmarshal(f.data[start:end], &s) != nil {
			return false
		}
		fv.SetString(s)
		return true
	case jkEnum:
		if c != '"' {
			return false
		}
		start := f.pos
		end, _ := f.str()
		if end < 0 {
			return false
		}
		n, ok := jf.codeValue(f.data[start:end])
		if !ok {
			return false
		}
		fv.SetInt(n)
		return true
	case jkBool:
		switch {
		case f.literal("true"):
			fv.SetBool(true)
		case f.literal("false"):
			fv.SetBool(false)
		default:
			return false
		}
		return true
	case jkNumber, jkInt:
		start := f.pos
		if !f.number() {
			return false
		}
		lit := f.data[start:f.pos]
		if jf.kind == jkNumber {
			fv.SetString(string(lit))
			return true
		}
		n, err := strconv.ParseInt(string(lit), 10, 32)
		if err != nil {
			return false
		}
		fv.SetInt(n)
		return true
	case jkRaw:
		start := f.pos
		if !f.skip() {
			return false
		}
		// The bytes of the value, as json.RawMessage keeps them (shared with
		// the input, which the decoder never changes, instead of copied).
		fv.SetBytes(f.data[start:f.pos:f.pos])
		return true
	}
	return false
}

// literal moves past word (true, false, null) when it is next.
func (f *filler) literal(word string) bool {
	if len(f.data)-f.pos < len(word) || string(f.data[f.pos:f.pos+len(word)]) != word {
		return false
	}
	f.pos += len(word)
	return true
}

// str moves past the string at f.pos ('"') and returns the position after
// its closing quote, or -1 when it is not a valid JSON string (a control
// character, a bad escape, no closing quote), and whether it is plain:
// printable ASCII without escapes, so its bytes are its value.
func (f *filler) str() (int, bool) {
	plain := true
	d := f.data
	for i := f.pos + 1; i < len(d); {
		// Eight plain bytes at a time, then one by one.
		for i+8 <= len(d) && !specialIn(binary.LittleEndian.Uint64(d[i:])) {
			i += 8
		}
		if i >= len(d) {
			break
		}
		c := d[i]
		if plainByte[c] {
			i++
			continue
		}
		switch {
		case c == '"':
			f.pos = i + 1
			return f.pos, plain
		case c == '\\':
			plain = false
			if i+1 >= len(d) {
				return -1, false
			}
			switch d[i+1] {
			case '"', '\\', '/', 'b', 'f', 'n', 'r', 't':
				i += 2
			case 'u':
				if i+6 > len(d) {
					return -1, false
				}
				for _, h := range d[i+2 : i+6] {
					if !('0' <= h && h <= '9' || 'a' <= h && h <= 'f' || 'A' <= h && h <= 'F') {
						return -1, false
					}
				}
				i += 6
			default:
				return -1, false
			}
			continue
		case c < 0x20:
			return -1, false
		case c >= 0x80:
			plain = false
		}
		i++
	}
	return -1, false
}

// plainByte holds the bytes that stand for themselves in a JSON string:
// printable ASCII but '"' and '\\'.
var plainByte = func() (t [256]bool) {
	for c := 0x20; c < 0x80; c++ {
		t[c] = c != '"' && c != '\\'
	}
	return t
}()

// specialIn reports whether any of the eight bytes of w is not plain: below
// 0x20, 0x80 or above, '"' or '\\' (the exact zero-byte test of "Bit
// Twiddling Hacks", S. E. Anderson: (x - 0x01..) & ^x & 0x80.. is non-zero
// exactly when some byte of x is zero).
func specialIn(w uint64) bool {
	const ones, highs = 0x0101010101010101, 0x8080808080808080
	zero := func(x uint64) uint64 { return (x - ones) & ^x & highs }
	// A byte below 0x20 (of one under 0x80): x - 0x20 borrows into its high bit.
	below := (w - 0x20*ones) & ^w & highs
	return below|w&highs|zero(w^('"'*ones))|zero(w^('\\'*ones)) != 0
}

func isDigit(c byte) bool { return '0' <= c && c <= '9' }

// number moves past a JSON number (RFC 8259 grammar, as encoding/json's
// scanner); false when there is none.
func (f *filler) number() bool {
	d, i := f.data, f.pos
	if i < len(d) && d[i] == '-' {
		i++
	}
	switch {
	case i >= len(d):
		return false
	case d[i] == '0':
		i++
	case '1' <= d[i] && d[i] <= '9':
		for i < len(d) && isDigit(d[i]) {
			i++
		}
	default:
		return false
	}
	if i < len(d) && d[i] == '.' {
		i++
		if i >= len(d) || !isDigit(d[i]) {
			return false
		}
		for i < len(d) && isDigit(d[i]) {
			i++
		}
	}
	if i < len(d) && (d[i] == 'e' || d[i] == 'E') {
		i++
		if i < len(d) && (d[i] == '+' || d[i] == '-') {
			i++
		}
		if i >= len(d) || !isDigit(d[i]) {
			return false
		}
		for i < len(d) && isDigit(d[i]) {
			i++
		}
	}
	f.pos = i
	return true
}

// skip moves past any JSON value, checking its syntax and its nesting
// (the strict pass's skipValue counts the same levels).
func (f *filler) skip() bool {
	switch c := f.peek(); {
	case c == '"':
		end, _ := f.str()
		return end >= 0
	case c == '{' || c == '[':
		if f.depth++; f.depth > MaxNestingDepth {
			return false
		}
		closer := byte('}')
		if c == '[' {
			closer = ']'
		}
		f.pos++
		f.ws()
		if f.peek() == closer {
			f.pos++
			f.depth--
			return true
		}
		for {
			if c == '{' {
				if f.peek() != '"' {
					return false
				}
				if end, _ := f.str(); end < 0 {
					return false
				}
				f.ws()
				if f.peek() != ':' {
					return false
				}
				f.pos++
				f.ws()
			}
			if !f.skip() {
				return false
			}
			f.ws()
			switch f.peek() {
			case ',':
				f.pos++
				f.ws()
			case closer:
				f.pos++
				f.depth--
				return true
			default:
				return false
			}
		}
	case c == 't':
		return f.literal("true")
	case c == 'f':
		return f.literal("false")
	case c == 'n':
		return f.literal("null")
	case c == '-' || isDigit(c):
		return f.number()
	}
	return false
}
