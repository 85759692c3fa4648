package deploy

import (
	"bufio"
	"encoding/json"
	"fmt"
	"path"
	"strings"
)

// The artefacts checked here are read by tools that are not available to
// the tests (Docker's builder, systemd as PID 1), so the tests parse them
// with small parsers that follow those tools' documented syntax closely
// enough for the checks made. Each parser has a fuzz test.

// instruction is one Dockerfile instruction after line continuations are
// joined.
type instruction struct {
	Line int    // 1-based line the instruction starts on
	Cmd  string // upper case: FROM, RUN, ...
	Args string
}

// stage is one build stage: its FROM and what follows up to the next FROM.
type stage struct {
	Image    string
	Name     string
	Platform string
	Body     []instruction
}

// parseDockerfile follows the Dockerfile reference (docs.docker.com,
// "Dockerfile reference"): lines starting with # are comments (parser
// directives included), a trailing backslash continues the instruction,
// comment lines inside a continuation are dropped, keywords are case
// insensitive, and only ARG may come before the first FROM.
func parseDockerfile(src string) ([]stage, error) {
	var (
		stages  []stage
		pending strings.Builder
		start   int
	)
	flush := func() error {
		text := strings.TrimSpace(pending.String())
		pending.Reset()
		if text == "" {
			return nil
		}
		cmd, args, _ := strings.Cut(text, " ")
		in := instruction{Line: start, Cmd: strings.ToUpper(cmd), Args: strings.TrimSpace(args)}
		if in.Cmd == "FROM" {
			st, err := parseFrom(in.Args)
			if err != nil {
				return fmt.Errorf("line %d: %w", in.Line, err)
			}
			stages = append(stages, st)
			return nil
		}
		if len(stages) == 0 {
			if in.Cmd == "ARG" {
				return nil
			}
			return fmt.Errorf("line %d: %s before the first FROM", in.Line, in.Cmd)
		}
		stages[len(stages)-1].Body = append(stages[len(stages)-1].Body, in)
		return nil
	}
	sc := bufio.NewScanner(strings.NewReader(src))
	sc.Buffer(make([]byte, 0, 64*1024), 1<<20)
	n := 0
	continuing := false
	for sc.Scan() {
		n++
		line := strings.TrimRight(sc.Text(), " \t\r")
		trimmed := strings.TrimSpace(line)
		if strings.HasPrefix(trimmed, "#") {
			continue
		}
		if !continuing {
			if trimmed == "" {
				continue
			}
			start = n
		}
		if strings.HasSuffix(line, `\`) {
			pending.WriteString(strings.TrimSuffix(line, `\`))
			pending.WriteByte(' ')
			continuing = true
			continue
		}
		pending.WriteString(line)
		continuing = false
		if err := flush(); err != nil {
			return nil, err
		}
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("reading the Dockerfile: %w", err)
	}
	if err := flush(); err != nil {
		return nil, err
	}
	if len(stages) == 0 {
		return nil, fmt.Errorf("no FROM")
	}
	return stages, nil
}

// parseFrom reads "[--platform=P] IMAGE [AS NAME]".
func parseFrom(args string) (stage, error) {
	var st stage
	f := strings.Fields(args)
	for len(f) > 0 && strings.HasPrefix(f[0], "--") {
		if p, ok := strings.CutPrefix(f[0], "--platform="); ok {
			st.Platform = p
		}
		f = f[1:]
	}
	switch {
	case len(f) == 1:
	case len(f) == 3 && strings.EqualFold(f[1], "AS"):
		st.Name = f[2]
	default:
		return st, fmt.Errorf("FROM %q: want IMAGE [AS NAME]", args)
	}
	st.Image = f[0]
	return st, nil
}

// last returns the last instruction of a kind in a stage.
func (s stage) last(cmd string) (instruction, bool) {
	for i := len(s.Body) - 1; i >= 0; i-- {
		if s.Body[i].Cmd == cmd {
			return s.Body[i], true
		}
	}
	return instruction{}, false
}

// all returns every instruction of a kind in a stage.
func (s stage) all(cmd string) []instruction {
	var out []instruction
	for _, in := range s.Body {
		if in.Cmd == cmd {
			out = append(out, in)
		}
	}
	return out
}

// parseEnvInstruction reads ENV's "k=v k2="v 2"" form (and the legacy
// "k v" form), as the Dockerfile reference describes.
func parseEnvInstruction(args string) (map[string]string, error) {
	words, err := shellWords(args)
	if err != nil {
		return nil, err
	}
	out := map[string]string{}
	if len(words) >= 2 && !strings.Contains(words[0], "=") {
		out[words[0]] = strings.Join(words[1:], " ")
		return out, nil
	}
	for _, w := range words {
		k, v, ok := strings.Cut(w, "=")
		if !ok || k == "" {
			return nil, fmt.Errorf("ENV %q: want KEY=VALUE", w)
		}
		out[k] = v
	}
	return out, nil
}

// shellWords splits on blanks, honouring double and single quotes and
// backslash escapes: enough for ENV lines.
func shellWords(s string) ([]string, error) {
	var (
		words []string
		cur   strings.Builder
		inTok bool
		quote rune
		esc   bool
	)
	for _, r := range s {
		switch {
		case esc:
			cur.WriteRune(r)
			esc = false
		case r == '\\' && quote != '\'':
			esc, inTok = true, true
		case quote != 0:
			if r == quote {
				quote = 0
			} else {
				cur.WriteRune(r)
			}
		case r == '"' || r == '\'':
			quote, inTok = r, true
		case r == ' ' || r == '\t':
			if inTok {
				words = append(words, cur.String())
				cur.Reset()
				inTok = false
			}
		default:
			cur.WriteRune(r)
			inTok = true
		}
	}
	if quote != 0 || esc {
		return nil, fmt.Errorf("unterminated quote or escape in %q", s)
	}
	if inTok {
		words = append(words, cur.String())
	}
	return words, nil
}

// execForm decodes the JSON array form of ENTRYPOINT and CMD.
func execForm(args string) ([]string, error) {
	var out []string
	if err := json.Unmarshal([]byte(args), &out); err != nil {
		return nil, fmt.Errorf("not the JSON exec form: %w", err)
	}
	return out, nil
}

// ignoreMatcher follows .dockerignore's rules (docs.docker.com, "Dockerfile
// reference", .dockerignore file): patterns are cleaned paths relative to
// the context root, ** matches any number of directories, other segments
// use Go's path.Match, a path is excluded when it or any directory above it
// matches, and a later "!" pattern re-includes.
type ignoreMatcher struct {
	rules []ignoreRule
}

type ignoreRule struct {
	segs    []string
	include bool
}

func parseDockerignore(src string) (ignoreMatcher, error) {
	var m ignoreMatcher
	for i, line := range strings.Split(src, "\n") {
		line = strings.TrimSpace(line)
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		r := ignoreRule{}
		if p, ok := strings.CutPrefix(line, "!"); ok {
			r.include, line = true, strings.TrimSpace(p)
		}
		line = strings.TrimPrefix(path.Clean("/"+line), "/")
		if line == "" {
			continue
		}
		r.segs = strings.Split(line, "/")
		for _, s := range r.segs {
			if s == "**" {
				continue
			}
			if _, err := path.Match(s, ""); err != nil {
				return m, fmt.Errorf("line %d: pattern %q: %w", i+1, line, err)
			}
		}
		m.rules = append(m.rules, r)
	}
	return m, nil
}

// Excluded reports whether a slash-separated path relative to the context
// root is left out of the build context.
func (m ignoreMatcher) Excluded(p string) bool {
	p = strings.TrimPrefix(path.Clean("/"+p), "/")
	if p == "" {
		return false
	}
	segs := strings.Split(p, "/")
	excluded := false
	for _, r := range m.rules {
		hit := false
		for n := 1; n <= len(segs) && !hit; n++ {
			hit = matchSegs(r.segs, segs[:n])
		}
		if hit {
			excluded = !r.include
		}
	}
	return excluded
}

func matchSegs(pat, name []string) bool {
	if len(pat) == 0 {
		return len(name) == 0
	}
	if pat[0] == "**" {
		for i := 0; i <= len(name); i++ {
			if matchSegs(pat[1:], name[i:]) {
				return true
			}
		}
		return false
	}
	if len(name) == 0 {
		return false
	}
	ok, err := path.Match(pat[0], name[0])
	return err == nil && ok && matchSegs(pat[1:], name[1:])
}

// unit is a systemd unit file: section -> key -> values in order.
type unit map[string]map[string][]string

// parseUnit follows systemd.syntax(7): [Section] headers, KEY=VALUE lines
// with blanks around = ignored, # and ; comment lines, and a trailing
// backslash joining the next line with a space. A key may repeat; an empty
// assignment resets the list, as it does for list-valued settings in
// systemd.exec(5), but it is kept here as "" so tests can see it.
func parseUnit(src string) (unit, error) {
	u := unit{}
	section := ""
	var pending strings.Builder
	lineNo := 0
	for _, raw := range strings.Split(src, "\n") {
		lineNo++
		line := strings.TrimRight(raw, " \t\r")
		if pending.Len() == 0 {
			line = strings.TrimLeft(line, " \t")
			if line == "" || line[0] == '#' || line[0] == ';' {
				continue
			}
		} else if t := strings.TrimLeft(line, " \t"); t != "" && (t[0] == '#' || t[0] == ';') {
			continue
		}
		if strings.HasSuffix(line, `\`) {
			pending.WriteString(strings.TrimSuffix(line, `\`))
			pending.WriteByte(' ')
			continue
		}
		pending.WriteString(line)
		text := pending.String()
		pending.Reset()
		if strings.HasPrefix(text, "[") {
			if !strings.HasSuffix(text, "]") || len(text) < 3 {
				return nil, fmt.Errorf("line %d: bad section header %q", lineNo, text)
			}
			section = text[1 : len(text)-1]
			if u[section] == nil {
				u[section] = map[string][]string{}
			}
			continue
		}
		if section == "" {
			return nil, fmt.Errorf("line %d: assignment before any section", lineNo)
		}
		k, v, ok := strings.Cut(text, "=")
		k = strings.TrimSpace(k)
		if !ok || k == "" {
			return nil, fmt.Errorf("line %d: want KEY=VALUE, got %q", lineNo, text)
		}
		u[section][k] = append(u[section][k], strings.TrimSpace(v))
	}
	if pending.Len() > 0 {
		return nil, fmt.Errorf("file ends inside a continued line")
	}
	return u, nil
}

// one returns the last value of a key, as systemd does for single-valued
// settings.
func (u unit) one(section, key string) (string, bool) {
	v := u[section][key]
	if len(v) == 0 {
		return "", false
	}
	return v[len(v)-1], true
}

// parseEnvFile reads systemd's EnvironmentFile= format (systemd.exec(5)):
// KEY=VALUE lines, # and ; comments, blank lines; surrounding double or
// single quotes are removed. It rejects what systemd would not take as a
// variable name.
func parseEnvFile(src string) (map[string]string, []string, error) {
	env := map[string]string{}
	var order []string
	for i, line := range strings.Split(src, "\n") {
		line = strings.TrimSpace(line)
		if line == "" || line[0] == '#' || line[0] == ';' {
			continue
		}
		k, v, ok := strings.Cut(line, "=")
		k = strings.TrimSpace(k)
		if !ok || !validEnvName(k) {
			return nil, nil, fmt.Errorf("line %d: want NAME=VALUE, got %q", i+1, line)
		}
		v = strings.TrimSpace(v)
		if len(v) >= 2 && (v[0] == '"' || v[0] == '\'') && v[len(v)-1] == v[0] {
			v = v[1 : len(v)-1]
		}
		if _, dup := env[k]; !dup {
			order = append(order, k)
		}
		env[k] = v
	}
	return env, order, nil
}

func validEnvName(k string) bool {
	if k == "" || (k[0] >= '0' && k[0] <= '9') {
		return false
	}
	for _, r := range k {
		if !(r == '_' || r >= 'A' && r <= 'Z' || r >= 'a' && r <= 'z' || r >= '0' && r <= '9') {
			return false
		}
	}
	return true
}
