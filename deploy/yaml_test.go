package deploy

// The YAML files of this folder and docker-compose.yml are read by the small
// parser below, for a strict subset of YAML, because go.mod does not require
// a YAML library. The subset: block mappings and block sequences nested by
// indentation (spaces only); plain, single-quoted and double-quoted scalars
// on one line; flow collections in JSON syntax ("[...]", "{...}"), which may
// span lines; comments. Anything outside it (anchors, aliases, tags, block
// scalars, multi-line plain scalars, documents) is an error naming the line,
// never a silent misreading: the files should then keep to the subset, or the
// tests move to a YAML library (go.yaml.in/yaml/v3 is in go.sum).
//
// Scalars are kept as their text: a port or a boolean is a string.

import (
	"encoding/json"
	"fmt"
	"reflect"
	"strings"
	"testing"
)

// yamlLine is one line of a YAML file that holds more than a comment.
type yamlLine struct {
	num    int    // 1-based line number
	indent int    // leading spaces
	text   string // the rest, without a trailing comment or spaces
}

// yamlParser reads the lines of one file, front to back.
type yamlParser struct {
	lines []yamlLine
	pos   int
}

// parseYAML parses src into nested map[string]any, []any, string and nil
// values.
func parseYAML(src string) (any, error) {
	var p yamlParser
	for i, raw := range strings.Split(src, "\n") {
		raw = strings.TrimRight(raw, " \r")
		body := strings.TrimLeft(raw, " ")
		if strings.HasPrefix(body, "\t") {
			return nil, fmt.Errorf("yaml: line %d: tab in indentation", i+1)
		}
		text, err := stripComment(body)
		if err != nil {
			return nil, fmt.Errorf("yaml: line %d: %w", i+1, err)
		}
		if text == "" {
			continue
		}
		if text == "---" || text == "..." || strings.HasPrefix(text, "%") {
			return nil, fmt.Errorf("yaml: line %d: documents and directives are outside the subset", i+1)
		}
		p.lines = append(p.lines, yamlLine{num: i + 1, indent: len(raw) - len(body), text: text})
	}
	if len(p.lines) == 0 {
		return nil, nil
	}
	if p.lines[0].indent != 0 {
		return nil, fmt.Errorf("yaml: line %d: the document is indented", p.lines[0].num)
	}
	v, err := p.node(0)
	if err != nil {
		return nil, err
	}
	if p.pos < len(p.lines) {
		return nil, fmt.Errorf("yaml: line %d: unexpected indentation", p.lines[p.pos].num)
	}
	return v, nil
}

// stripComment removes a comment ('#' at the start or after a space, outside
// quotes) and the spaces before it.
func stripComment(s string) (string, error) {
	var quote byte
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch {
		case quote == '"' && c == '\\':
			i++
		case quote != 0:
			if c == quote {
				quote = 0
			}
		case c == '"' || c == '\'':
			quote = c
		case c == '#' && (i == 0 || s[i-1] == ' '):
			return strings.TrimRight(s[:i], " "), nil
		}
	}
	return s, nil
}

// node parses the block starting at the current line, if it is indented at
// least minIndent; otherwise the value is empty (nil).
func (p *yamlParser) node(minIndent int) (any, error) {
	if p.pos >= len(p.lines) || p.lines[p.pos].indent < minIndent {
		return nil, nil
	}
	l := p.lines[p.pos]
	if isSeqItem(l.text) {
		return p.seq(l.indent)
	}
	return p.mapping(l.indent)
}

func isSeqItem(text string) bool { return text == "-" || strings.HasPrefix(text, "- ") }

func (p *yamlParser) seq(indent int) ([]any, error) {
	out := []any{}
	for p.pos < len(p.lines) && p.lines[p.pos].indent == indent && isSeqItem(p.lines[p.pos].text) {
		l := p.lines[p.pos]
		rest := strings.TrimLeft(strings.TrimPrefix(l.text, "-"), " ")
		if rest == "" {
			p.pos++
			v, err := p.node(indent + 1)
			if err != nil {
				return nil, err
			}
			out = append(out, v)
			continue
		}
		if _, _, isKey, err := splitKey(rest); err != nil {
			return nil, fmt.Errorf("yaml: line %d: %w", l.num, err)
		} else if isKey {
			// "- key: value": a mapping indented at the key's column.
			p.lines[p.pos] = yamlLine{num: l.num, indent: indent + len(l.text) - len(rest), text: rest}
			v, err := p.mapping(p.lines[p.pos].indent)
			if err != nil {
				return nil, err
			}
			out = append(out, v)
			continue
		}
		p.pos++
		v, err := p.value(rest, l.num)
		if err != nil {
			return nil, err
		}
		out = append(out, v)
	}
	if p.pos < len(p.lines) && p.lines[p.pos].indent > indent {
		return nil, fmt.Errorf("yaml: line %d: unexpected indentation", p.lines[p.pos].num)
	}
	return out, nil
}

func (p *yamlParser) mapping(indent int) (map[string]any, error) {
	out := map[string]any{}
	for p.pos < len(p.lines) && p.lines[p.pos].indent == indent {
		l := p.lines[p.pos]
		if isSeqItem(l.text) {
			return nil, fmt.Errorf("yaml: line %d: sequence item in a mapping", l.num)
		}
		key, rest, isKey, err := splitKey(l.text)
		if err != nil {
			return nil, fmt.Errorf("yaml: line %d: %w", l.num, err)
		}
		if !isKey {
			return nil, fmt.Errorf("yaml: line %d: want \"key: value\", have %q", l.num, l.text)
		}
		if _, dup := out[key]; dup {
			return nil, fmt.Errorf("yaml: line %d: duplicate key %q", l.num, key)
		}
		p.pos++
		var v any
		switch {
		case rest != "":
			v, err = p.value(rest, l.num)
		case p.pos < len(p.lines) && p.lines[p.pos].indent == indent && isSeqItem(p.lines[p.pos].text):
			v, err = p.seq(indent) // a sequence may sit at its key's indentation
		default:
			v, err = p.node(indent + 1)
		}
		if err != nil {
			return nil, err
		}
		out[key] = v
	}
	if p.pos < len(p.lines) && p.lines[p.pos].indent > indent {
		return nil, fmt.Errorf("yaml: line %d: unexpected indentation", p.lines[p.pos].num)
	}
	return out, nil
}

// splitKey splits "key: rest" or "key:"; isKey is false for a text that is
// not a mapping entry.
func splitKey(text string) (key, rest string, isKey bool, err error) {
	if strings.HasPrefix(text, `"`) {
		end := closingQuote(text)
		if end < 0 {
			return "", "", false, fmt.Errorf("unterminated string")
		}
		after := text[end+1:]
		if after != ":" && !strings.HasPrefix(after, ": ") {
			return "", "", false, nil
		}
		if err := json.Unmarshal([]byte(text[:end+1]), &key); err != nil {
			return "", "", false, fmt.Errorf("key %s: %w", text[:end+1], err)
		}
		return key, strings.TrimLeft(after[1:], " "), true, nil
	}
	if strings.ContainsAny(text[:1], "[{'") {
		return "", "", false, nil
	}
	i := strings.Index(text, ": ")
	if i < 0 {
		if !strings.HasSuffix(text, ":") {
			return "", "", false, nil
		}
		i = len(text) - 1
	}
	key = text[:i]
	if strings.ContainsAny(key[:1], "&*!|>%@`?") {
		return "", "", false, fmt.Errorf("key %q: outside the subset", key)
	}
	return key, strings.TrimLeft(text[i+1:], " "), true, nil
}

// closingQuote returns the index of the quote that ends the double-quoted
// string s starts with, or -1.
func closingQuote(s string) int {
	for i := 1; i < len(s); i++ {
		switch s[i] {
		case '\\':
			i++
		case '"':
			return i
		}
	}
	return -1
}

// value parses the scalar or flow collection text starting on line num; a
// flow collection may continue on the following lines.
func (p *yamlParser) value(text string, num int) (any, error) {
	switch text[0] {
	case '[', '{':
		for !balanced(text) {
			if p.pos >= len(p.lines) {
				return nil, fmt.Errorf("yaml: line %d: unterminated flow collection", num)
			}
			text += " " + p.lines[p.pos].text
			p.pos++
		}
		dec := json.NewDecoder(strings.NewReader(text))
		dec.UseNumber()
		var v any
		if err := dec.Decode(&v); err != nil || dec.More() {
			return nil, fmt.Errorf("yaml: line %d: flow collection is not in JSON syntax (the subset this parser reads): %s", num, text)
		}
		return jsonToYAML(v), nil
	case '"':
		var s string
		if end := closingQuote(text); end != len(text)-1 {
			return nil, fmt.Errorf("yaml: line %d: text after a quoted string, or unterminated: %s", num, text)
		}
		if err := json.Unmarshal([]byte(text), &s); err != nil {
			return nil, fmt.Errorf("yaml: line %d: %s: %w", num, text, err)
		}
		return s, nil
	case '\'':
		if len(text) < 2 || !strings.HasSuffix(text, "'") || strings.Contains(strings.ReplaceAll(text[1:len(text)-1], "''", ""), "'") {
			return nil, fmt.Errorf("yaml: line %d: bad single-quoted string: %s", num, text)
		}
		return strings.ReplaceAll(text[1:len(text)-1], "''", "'"), nil
	case '&', '*', '!', '|', '>', '%', '@', '`', '?':
		return nil, fmt.Errorf("yaml: line %d: %q is outside the subset (anchors, aliases, tags, block scalars)", num, text)
	}
	if strings.Contains(text, ": ") {
		return nil, fmt.Errorf("yaml: line %d: plain scalar with \": \": %s", num, text)
	}
	if p.pos < len(p.lines) && p.lines[p.pos].indent > 0 && p.lines[p.pos].indent > p.lines[p.pos-1].indent &&
		!isSeqItem(p.lines[p.pos].text) {
		if _, _, isKey, _ := splitKey(p.lines[p.pos].text); !isKey {
			return nil, fmt.Errorf("yaml: line %d: multi-line plain scalars are outside the subset", p.lines[p.pos].num)
		}
	}
	return text, nil
}

// balanced reports whether every bracket opened in s, outside strings, is
// closed.
func balanced(s string) bool {
	depth := 0
	inStr := false
	for i := 0; i < len(s); i++ {
		switch c := s[i]; {
		case inStr && c == '\\':
			i++
		case inStr:
			inStr = c != '"'
		case c == '"':
			inStr = true
		case c == '[' || c == '{':
			depth++
		case c == ']' || c == '}':
			depth--
		}
	}
	return depth <= 0
}

// jsonToYAML turns decoded JSON into the parser's values: numbers and booleans
// become their text.
func jsonToYAML(v any) any {
	switch v := v.(type) {
	case map[string]any:
		for k, e := range v {
			v[k] = jsonToYAML(e)
		}
		return v
	case []any:
		for i, e := range v {
			v[i] = jsonToYAML(e)
		}
		return v
	case json.Number:
		return v.String()
	case bool:
		return fmt.Sprint(v)
	}
	return v
}

func TestParseYAML(t *testing.T) {
	cases := []struct {
		name string
		src  string
		want any
	}{
		{"empty", "# only a comment\n\n", nil},
		{"mapping", "a: 1\nb: two # comment\nc: \"x # y\"\nd: 'it''s'\n",
			map[string]any{"a": "1", "b": "two", "c": "x # y", "d": "it's"}},
		{"nested", "a:\n  b:\n    c: x\n  d: y\ne:\n",
			map[string]any{"a": map[string]any{"b": map[string]any{"c": "x"}, "d": "y"}, "e": nil}},
		{"sequences", "a:\n  - ./x:/y:ro\n  - \"127.0.0.1:1:2\"\nb:\n- p\n- q\n",
			map[string]any{"a": []any{"./x:/y:ro", "127.0.0.1:1:2"}, "b": []any{"p", "q"}}},
		{"mappings in a sequence", "s:\n  - name: n\n    url: http://h:1\n  - name: m\n",
			map[string]any{"s": []any{map[string]any{"name": "n", "url": "http://h:1"}, map[string]any{"name": "m"}}}},
		{"flow over lines", "c: [\"a\", \"b,c\",\n     \"d\", 3, true]\nv: {}\n",
			map[string]any{"c": []any{"a", "b,c", "d", "3", "true"}, "v": map[string]any{}}},
		{"quoted key and url value", "\"k\": nats://h:4222\n", map[string]any{"k": "nats://h:4222"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := parseYAML(c.src)
			if err != nil {
				t.Fatal(err)
			}
			if !reflect.DeepEqual(got, c.want) {
				t.Errorf("got %#v, want %#v", got, c.want)
			}
		})
	}

	bad := []struct {
		name string
		src  string
	}{
		{"tab", "a:\n\tb: c\n"},
		{"anchor", "a: &x 1\n"},
		{"alias", "a: *x\n"},
		{"block scalar", "a: |\n  text\n"},
		{"non-JSON flow", "a: [x, y]\n"},
		{"unterminated flow", "a: [\"x\",\n"},
		{"duplicate key", "a: 1\na: 2\n"},
		{"bad indentation", "a:\n    b: 1\n  c: 2\n"},
		{"colon in plain scalar", "a: b: c\n"},
		{"multi-line plain scalar", "a: one\n  two\n"},
		{"document marker", "---\na: 1\n"},
		{"sequence in mapping", "a: 1\n- b\n"},
		{"text after string", "a: \"x\" y\n"},
	}
	for _, c := range bad {
		t.Run("refuses "+c.name, func(t *testing.T) {
			if v, err := parseYAML(c.src); err == nil {
				t.Errorf("parsed %q as %#v, want an error", c.src, v)
			}
		})
	}
}

// yamlMap, yamlList and yamlString read parsed values, failing the test with
// what for a value of another shape.
func yamlMap(t *testing.T, v any, what string) map[string]any {
	t.Helper()
	if v == nil {
		return map[string]any{}
	}
	m, ok := v.(map[string]any)
	if !ok {
		t.Fatalf("%s: want a mapping, have %#v", what, v)
	}
	return m
}

func yamlList(t *testing.T, v any, what string) []any {
	t.Helper()
	if v == nil {
		return nil
	}
	l, ok := v.([]any)
	if !ok {
		t.Fatalf("%s: want a sequence, have %#v", what, v)
	}
	return l
}

func yamlString(t *testing.T, v any, what string) string {
	t.Helper()
	s, ok := v.(string)
	if !ok {
		t.Fatalf("%s: want a scalar, have %#v", what, v)
	}
	return s
}

func yamlStrings(t *testing.T, v any, what string) []string {
	t.Helper()
	var out []string
	for i, e := range yamlList(t, v, what) {
		out = append(out, yamlString(t, e, fmt.Sprintf("%s[%d]", what, i)))
	}
	return out
}
