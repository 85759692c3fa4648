package ui

import (
	"bufio"
	"crypto/sha256"
	"embed"
	"encoding/base64"
	"encoding/hex"
	"fmt"
	"html/template"
	"io"
	"net/url"
	"os"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

//go:embed templates/pages.html templates/style.css
var files embed.FS

var (
	styleSheet = mustRead("templates/style.css")
	// styleHash is the stylesheet's CSP source, for the report file,
	// which has no server to send a nonce.
	styleHash = func() string {
		sum := sha256.Sum256([]byte(styleSheet))
		return "'sha256-" + base64.StdEncoding.EncodeToString(sum[:]) + "'"
	}()
	pages = template.Must(template.New("pages").Funcs(funcs).ParseFS(files, "templates/pages.html"))
)

func mustRead(name string) string {
	b, err := files.ReadFile(name)
	if err != nil {
		panic(err)
	}
	return string(b)
}

// Report is the whole offline report.
type Report struct {
	Generated    time.Time
	Overview     Overview
	Timelines    []Timeline
	Explanations []Explanation
}

// Page is what one rendered page shows; exactly one of the content fields
// is set.
type Page struct {
	Title   string
	Nonce   string
	MetaCSP string
	CSS     template.CSS
	User    string
	Nav     bool
	L       Links
	Message string

	Overview    *Overview
	Timeline    *Timeline
	Explanation *Explanation
	Operations  *Operations
	Report      *Report
}

// Links makes the pages' hrefs: paths on the served site, or anchors
// within the one report file.
type Links struct {
	// Live is true on the served site.
	Live bool
}

// Overview is the href of the unit overview.
func (l Links) Overview() string {
	if l.Live {
		return "/"
	}
	return "#overview"
}

// Operations is the href of the operations page.
func (l Links) Operations() string { return "/operations" }

// Patient is the href of a patient's timeline.
func (l Links) Patient(id string) string {
	if l.Live {
		return "/patient/" + url.PathEscape(id)
	}
	return "#" + l.PatientAnchor(id)
}

// PatientAnchor is the id of a patient's section.
func (l Links) PatientAnchor(id string) string { return "p-" + id }

// Explain is the href of an explanation.
func (l Links) Explain(id string) string {
	if id == "" {
		return ""
	}
	if l.Live {
		return "/explain/" + url.PathEscape(id)
	}
	return "#" + l.ExplainAnchor(id)
}

// ExplainAnchor is the id of an explanation's section: "x" and the first
// 16 hex digits of the key, enough to be unique within one report.
func (l Links) ExplainAnchor(id string) string {
	h := strings.TrimPrefix(id, "sha256:")
	if len(h) > 16 {
		h = h[:16]
	}
	if _, err := hex.DecodeString(h); err != nil {
		return "x-unknown"
	}
	return "x" + h
}

type pair struct {
	P *Page
	L Links
	V any
}

var funcs = template.FuncMap{
	"pair": func(p *Page, v any) pair { return pair{P: p, L: p.L, V: v} },
	"overviewpage": func(p *Page, o Overview) *Page {
		c := *p
		c.Overview = &o
		return &c
	},
	"timelinepage": func(p *Page, t Timeline) *Page {
		c := *p
		c.Timeline = &t
		return &c
	},
	"plot": func(p *Page, t *Timeline) template.HTML { return Plot(t, p.L) },
	"cell": func(r Row, c derive.Code) *Value {
		if v, ok := r.Values[c]; ok {
			return &v
		}
		return nil
	},
	"fmtnum":     FormatValue,
	"fmttime":    func(t time.Time) string { return t.UTC().Format("2006-01-02 15:04") },
	"fmtclock":   func(t time.Time) string { return t.UTC().Format("15:04") },
	"label":      Label,
	"tablecodes": func() []derive.Code { return TableCodes },
	"unitof": func(c derive.Code) string {
		switch c {
		case derive.CodeGradient:
			return "mm[Hg]"
		case derive.CodeDeadSpaceVolume:
			return "mL"
		case derive.CodeAlveolarVent:
			return "L/min"
		}
		return "fraction"
	},
	"flagword": func(f string) string {
		switch f {
		case "H":
			return "above the reference range"
		case "L":
			return "below the reference range"
		case "N":
			return "within the reference range"
		}
		return ""
	},
	"superseded": func(vs []Value) []Value {
		var out []Value
		for _, v := range vs {
			if v.Status == StatusSuperseded || v.Status == StatusWithdrawn {
				out = append(out, v)
			}
		}
		return out
	},
}

// render writes one page.
func render(w io.Writer, p *Page) error {
	p.CSS = template.CSS(styleSheet)
	if err := pages.ExecuteTemplate(w, "site", p); err != nil {
		return fmt.Errorf("ui: render %s: %w", p.Title, err)
	}
	return nil
}

// ReportCSP is the Content-Security-Policy of the report file: nothing
// loads, nothing runs; only its own stylesheet applies.
func ReportCSP() string {
	return "default-src 'none'; style-src " + styleHash + "; img-src data:; base-uri 'none'; form-action 'none'"
}

// WriteReport writes the offline report as one self-contained HTML file.
func WriteReport(w io.Writer, r Report) error {
	return render(w, &Page{Title: "replay report", MetaCSP: ReportCSP(), Report: &r})
}

// WriteReportFile writes the report to a file, replacing it.
func WriteReportFile(path string, r Report) (err error) {
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("ui: report: %w", err)
	}
	defer func() {
		if cerr := f.Close(); err == nil && cerr != nil {
			err = fmt.Errorf("ui: report: %w", cerr)
		}
	}()
	w := bufio.NewWriter(f)
	if err := WriteReport(w, r); err != nil {
		return err
	}
	if err := w.Flush(); err != nil {
		return fmt.Errorf("ui: report: %w", err)
	}
	return nil
}
