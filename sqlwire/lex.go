package sqlwire

import (
	"strings"
	"unicode/utf8"
)

// tokKind is the kind of a lexical token of the SQL subset.
type tokKind uint8

const (
	tokEOF    tokKind = iota
	tokIdent          // unquoted identifier or keyword, lower-cased
	tokQIdent         // "quoted identifier", case kept
	tokString         // 'string' or E'string', unescaped
	tokNumber         // 123, 1.5, 1e-3
	tokParam          // $1
	tokOp             // operator: = <> < <= + - * / ~~ ...
	tokPunct          // ( ) [ ] , . ; ::
)

type token struct {
	kind tokKind
	text string // identifier (lower-cased unless quoted), string contents, number or operator text
	pos  int    // byte offset in the statement, for error positions
}

func (t token) is(kind tokKind, text string) bool { return t.kind == kind && t.text == text }

// isKeyword reports whether t is the unquoted word w (w lower-case).
func (t token) isKeyword(w string) bool { return t.kind == tokIdent && t.text == w }

// opChars are the characters Postgres allows in operator names.
const opChars = "+-*/<>=~!@#%^&|`?"

// lex splits a statement into tokens the way the Postgres scanner does for
// the subset sidetrend accepts: identifiers fold to lower case unless
// double-quoted, ” doubles a quote, E'...' takes backslash escapes
// (standard_conforming_strings is on), comments are skipped, and a
// multi-character operator does not end in + or - unless it contains one of
// ~ ! @ # % ^ & | ` ? (so "=-1" is "=" then "-1").
func lex(sql string) ([]token, error) {
	var toks []token
	i := 0
	for i < len(sql) {
		c := sql[i]
		switch {
		case c == ' ' || c == '\t' || c == '\n' || c == '\r' || c == '\f' || c == '\v':
			i++
		case c == '-' && i+1 < len(sql) && sql[i+1] == '-':
			for i < len(sql) && sql[i] != '\n' {
				i++
			}
		case c == '/' && i+1 < len(sql) && sql[i+1] == '*':
			start := i
			depth := 0
			for i < len(sql) {
				if strings.HasPrefix(sql[i:], "/*") {
					depth++
					i += 2
				} else if strings.HasPrefix(sql[i:], "*/") {
					depth--
					i += 2
					if depth == 0 {
						break
					}
				} else {
					i++
				}
			}
			if depth != 0 {
				return nil, syntaxErrorAt(start, "unterminated /* comment")
			}
		case (c == 'e' || c == 'E') && i+1 < len(sql) && sql[i+1] == '\'':
			s, n, err := lexEscapeString(sql, i+1)
			if err != nil {
				return nil, err
			}
			toks = append(toks, token{kind: tokString, text: s, pos: i})
			i = n
		case c == '\'':
			s, n, err := lexString(sql, i)
			if err != nil {
				return nil, err
			}
			toks = append(toks, token{kind: tokString, text: s, pos: i})
			i = n
		case c == '"':
			start := i
			var b strings.Builder
			i++
			for {
				if i >= len(sql) {
					return nil, syntaxErrorAt(start, "unterminated quoted identifier")
				}
				if sql[i] == '"' {
					if i+1 < len(sql) && sql[i+1] == '"' {
						b.WriteByte('"')
						i += 2
						continue
					}
					i++
					break
				}
				b.WriteByte(sql[i])
				i++
			}
			if b.Len() == 0 {
				return nil, syntaxErrorAt(start, "zero-length delimited identifier")
			}
			toks = append(toks, token{kind: tokQIdent, text: b.String(), pos: start})
		case isIdentStart(c):
			start := i
			for i < len(sql) && isIdentChar(sql[i]) {
				i++
			}
			toks = append(toks, token{kind: tokIdent, text: strings.ToLower(sql[start:i]), pos: start})
		case c >= '0' && c <= '9' || c == '.' && i+1 < len(sql) && sql[i+1] >= '0' && sql[i+1] <= '9':
			start := i
			for i < len(sql) && sql[i] >= '0' && sql[i] <= '9' {
				i++
			}
			if i < len(sql) && sql[i] == '.' && !(i+1 < len(sql) && sql[i+1] == '.') {
				i++
				for i < len(sql) && sql[i] >= '0' && sql[i] <= '9' {
					i++
				}
			}
			if i < len(sql) && (sql[i] == 'e' || sql[i] == 'E') {
				j := i + 1
				if j < len(sql) && (sql[j] == '+' || sql[j] == '-') {
					j++
				}
				if j < len(sql) && sql[j] >= '0' && sql[j] <= '9' {
					for j < len(sql) && sql[j] >= '0' && sql[j] <= '9' {
						j++
					}
					i = j
				}
			}
			if i < len(sql) && isIdentStart(sql[i]) {
				return nil, syntaxErrorAt(start, "trailing junk after numeric literal")
			}
			toks = append(toks, token{kind: tokNumber, text: sql[start:i], pos: start})
		case c == '$':
			start := i
			i++
			for i < len(sql) && sql[i] >= '0' && sql[i] <= '9' {
				i++
			}
			if i == start+1 {
				return nil, syntaxErrorAt(start, "dollar-quoted strings are not supported: use '...' literals")
			}
			toks = append(toks, token{kind: tokParam, text: sql[start+1 : i], pos: start})
		case c == ':' && i+1 < len(sql) && sql[i+1] == ':':
			toks = append(toks, token{kind: tokPunct, text: "::", pos: i})
			i += 2
		case strings.IndexByte("()[],.;:", c) >= 0:
			toks = append(toks, token{kind: tokPunct, text: string(c), pos: i})
			i++
		case strings.IndexByte(opChars, c) >= 0:
			start := i
			for i < len(sql) && strings.IndexByte(opChars, sql[i]) >= 0 {
				if strings.HasPrefix(sql[i:], "--") || strings.HasPrefix(sql[i:], "/*") {
					break
				}
				i++
			}
			op := sql[start:i]
			if len(op) > 1 && (op[len(op)-1] == '+' || op[len(op)-1] == '-') && !strings.ContainsAny(op, "~!@#%^&|`?") {
				for len(op) > 1 && (op[len(op)-1] == '+' || op[len(op)-1] == '-') {
					op = op[:len(op)-1]
				}
				i = start + len(op)
			}
			if op == "!=" {
				op = "<>"
			}
			toks = append(toks, token{kind: tokOp, text: op, pos: start})
		default:
			r, _ := utf8.DecodeRuneInString(sql[i:])
			if r >= 0x80 {
				// Postgres allows non-ASCII letters in identifiers.
				start := i
				for i < len(sql) {
					r, n := utf8.DecodeRuneInString(sql[i:])
					if r < 0x80 && !isIdentChar(byte(r)) {
						break
					}
					i += n
				}
				toks = append(toks, token{kind: tokIdent, text: strings.ToLower(sql[start:i]), pos: start})
				continue
			}
			return nil, syntaxErrorAt(i, "unexpected character %q", string(r))
		}
	}
	toks = append(toks, token{kind: tokEOF, pos: len(sql)})
	return toks, nil
}

func isIdentStart(c byte) bool {
	return c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c == '_'
}

func isIdentChar(c byte) bool { return isIdentStart(c) || c >= '0' && c <= '9' || c == '$' }

// lexString reads a standard-conforming '...' literal starting at sql[i],
// including SQL's rule that two literals separated by whitespace with a
// newline are one.
func lexString(sql string, i int) (string, int, error) {
	start := i
	var b strings.Builder
	i++
	for {
		if i >= len(sql) {
			return "", 0, syntaxErrorAt(start, "unterminated quoted string")
		}
		if sql[i] == '\'' {
			if i+1 < len(sql) && sql[i+1] == '\'' {
				b.WriteByte('\'')
				i += 2
				continue
			}
			i++
			if j, ok := continuation(sql, i); ok {
				i = j + 1
				continue
			}
			return b.String(), i, nil
		}
		b.WriteByte(sql[i])
		i++
	}
}

// continuation reports whether a string literal ending before sql[i]
// continues in another literal after whitespace that holds a newline; it
// returns the index of that literal's opening quote.
func continuation(sql string, i int) (int, bool) {
	newline := false
	for i < len(sql) {
		switch sql[i] {
		case '\n', '\r':
			newline = true
		case ' ', '\t', '\f':
		case '\'':
			return i, newline
		default:
			return 0, false
		}
		i++
	}
	return 0, false
}

// lexEscapeString reads an E'...' literal whose opening quote is sql[i].
func lexEscapeString(sql string, i int) (string, int, error) {
	start := i - 1
	var b strings.Builder
	i++
	for {
		if i >= len(sql) {
			return "", 0, syntaxErrorAt(start, "unterminated quoted string")
		}
		c := sql[i]
		switch {
		case c == '\'' && i+1 < len(sql) && sql[i+1] == '\'':
			b.WriteByte('\'')
			i += 2
		case c == '\'':
			return b.String(), i + 1, nil
		case c == '\\' && i+1 < len(sql):
			i++
			switch e := sql[i]; e {
			case 'b':
				b.WriteByte('\b')
			case 'f':
				b.WriteByte('\f')
			case 'n':
				b.WriteByte('\n')
			case 'r':
				b.WriteByte('\r')
			case 't':
				b.WriteByte('\t')
			case 'x', 'u', 'U', '0', '1', '2', '3', '4', '5', '6', '7':
				return "", 0, syntaxErrorAt(start, "numeric escapes in E'...' strings are not supported: write the characters themselves")
			default:
				b.WriteByte(e)
			}
			i++
		default:
			b.WriteByte(c)
			i++
		}
	}
}
