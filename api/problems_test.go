package api

import (
	"encoding/json"
	"errors"
	"fmt"
	"go/ast"
	"go/parser"
	"go/token"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/training"
)

// problemNameConstants reads the package's source for every constant of
// type problemName: the problem types the code can emit.
func problemNameConstants(t *testing.T) []problemName {
	t.Helper()
	files, err := filepath.Glob("*.go")
	if err != nil {
		t.Fatal(err)
	}
	var names []problemName
	fset := token.NewFileSet()
	for _, path := range files {
		if strings.HasSuffix(path, "_test.go") {
			continue
		}
		f, err := parser.ParseFile(fset, path, nil, 0)
		if err != nil {
			t.Fatal(err)
		}
		for _, decl := range f.Decls {
			gen, ok := decl.(*ast.GenDecl)
			if !ok || gen.Tok != token.CONST {
				continue
			}
			for _, spec := range gen.Specs {
				vs := spec.(*ast.ValueSpec)
				if typ, ok := vs.Type.(*ast.Ident); !ok || typ.Name != "problemName" {
					continue
				}
				for _, v := range vs.Values {
					lit, ok := v.(*ast.BasicLit)
					if !ok || lit.Kind != token.STRING {
						t.Fatalf("%s: a problemName constant that is not a string literal", fset.Position(v.Pos()))
					}
					name, err := strconv.Unquote(lit.Value)
					if err != nil {
						t.Fatal(err)
					}
					names = append(names, problemName(name))
				}
			}
		}
	}
	if len(names) == 0 {
		t.Fatal("no problemName constants found in the source")
	}
	return names
}

// docSections splits docs/problems.md into its "## " sections by heading.
func docSections(t *testing.T) (intro string, sections map[string]string) {
	t.Helper()
	data, err := os.ReadFile("../docs/problems.md")
	if err != nil {
		t.Fatal(err)
	}
	parts := strings.Split(string(data), "\n## ")
	sections = map[string]string{}
	for _, part := range parts[1:] {
		heading, body, _ := strings.Cut(part, "\n")
		sections[strings.TrimSpace(heading)] = body
	}
	return parts[0], sections
}

// openAPIProblemTypes is the enum of problem types in an OpenAPI document.
func openAPIProblemTypes(t *testing.T, document []byte) []string {
	t.Helper()
	var doc struct {
		Components struct {
			Schemas struct {
				Problem struct {
					Properties struct {
						Type struct {
							Enum []string `json:"enum"`
						} `json:"type"`
					} `json:"properties"`
				} `json:"Problem"`
			} `json:"schemas"`
		} `json:"components"`
	}
	if err := json.Unmarshal(document, &doc); err != nil {
		t.Fatalf("the OpenAPI document is not JSON: %v", err)
	}
	return doc.Components.Schemas.Problem.Properties.Type.Enum
}

// Every problem type the code can emit is documented with its status and
// title in docs/problems.md and listed in the OpenAPI document, and neither
// lists a type the code does not have.
func TestEveryProblemTypeIsDocumented(t *testing.T) {
	names := problemNameConstants(t)
	intro, sections := docSections(t)
	if !strings.Contains(intro, DefaultProblemDocs) {
		t.Errorf("docs/problems.md does not give the default address %s", DefaultProblemDocs)
	}
	want := []string{plainProblemType}
	for _, name := range names {
		def, ok := problemDefinitions[name]
		if !ok {
			t.Errorf("%s has no title and status in problemDefinitions", name)
			continue
		}
		want = append(want, DefaultProblemDocs+"#"+string(name))
		section, ok := sections[string(name)]
		if !ok {
			t.Errorf("docs/problems.md has no section %q", name)
		} else if !strings.HasPrefix(strings.TrimSpace(section), fmt.Sprintf("Status %d.", def.status)) {
			t.Errorf("docs/problems.md, section %s: does not start with %q", name, fmt.Sprintf("Status %d.", def.status))
		}
		row := fmt.Sprintf("| [`…#%s`](#%s) | %d | %s |", name, name, def.status, def.title)
		if !strings.Contains(intro, row) {
			t.Errorf("docs/problems.md: the table lacks the row %s", row)
		}
	}
	if len(problemDefinitions) != len(names) {
		t.Errorf("problemDefinitions has %d entries, the source %d problemName constants", len(problemDefinitions), len(names))
	}
	if _, ok := sections[plainProblemType]; !ok {
		t.Errorf("docs/problems.md has no section %q", plainProblemType)
	}
	for heading := range sections {
		if heading != plainProblemType && !slices.Contains(names, problemName(heading)) {
			t.Errorf("docs/problems.md documents %q, which the code never sends", heading)
		}
	}
	got := openAPIProblemTypes(t, OpenAPIDocument)
	slices.Sort(got)
	slices.Sort(want)
	if !slices.Equal(got, want) {
		t.Errorf("openapi.json lists the problem types\n%q\nthe code has\n%q", got, want)
	}
}

// Each domain error becomes its own problem type under the configured
// address; HTTP-level errors are about:blank with the status phrase as
// title (RFC 9457, section 4.2.1).
func TestErrorsBecomeTheirProblemTypes(t *testing.T) {
	pt := problemTypes{docs: "https://docs.example.com/p"}
	cases := []struct {
		err    error
		typ    string
		status int
	}{
		{training.Invalid(0, 1, "action", "unknown action %q", "fly"), "https://docs.example.com/p#invalid-input", 400},
		{training.NotFoundf("no policy named %q", "x"), "https://docs.example.com/p#not-found", 404},
		{fmt.Errorf("restore: %w", training.Conflictf("exists")), "https://docs.example.com/p#conflict", 409},
		{training.Unauthenticatedf("no token"), "https://docs.example.com/p#unauthenticated", 401},
		{training.Forbiddenf("no scope"), "https://docs.example.com/p#forbidden", 403},
		{training.Unavailablef("down"), "https://docs.example.com/p#unavailable", 503},
		{echo.NewHTTPError(http.StatusRequestEntityTooLarge, "too big"), plainProblemType, 413},
		{echo.ErrNotFound, plainProblemType, 404},
		{errors.New("boom"), plainProblemType, 500},
	}
	for _, c := range cases {
		p := pt.toProblem(c.err)
		if p.Type != c.typ || p.Status != c.status {
			t.Errorf("%v: type %q status %d, want %q %d", c.err, p.Type, p.Status, c.typ, c.status)
		}
		if p.Type == plainProblemType && p.Title != http.StatusText(p.Status) {
			t.Errorf("%v: about:blank with title %q, want the status phrase %q", c.err, p.Title, http.StatusText(p.Status))
		}
	}
}

func TestProblemDocsMustTakeFragments(t *testing.T) {
	for _, ok := range []string{DefaultProblemDocs, "https://docs.example.com/qtally/problems.html", "http://127.0.0.1:8000/problems"} {
		if err := CheckProblemDocs(ok); err != nil {
			t.Errorf("%s: %v", ok, err)
		}
	}
	for _, bad := range []string{"", "urn:example:problems", "/docs/problems.md", "https://docs.example.com/p#x", "https://docs.example.com/p?v=1", "ftp://docs.example.com/p", "https:///p"} {
		if err := CheckProblemDocs(bad); err == nil {
			t.Errorf("%q accepted", bad)
		}
	}
}

// The served document names the configured address, escaped as JSON needs.
func TestOpenAPIDocumentNamesTheConfiguredAddress(t *testing.T) {
	docs := `https://docs.example.com/q"tally\problems`
	enum := openAPIProblemTypes(t, openAPIDocument(docs))
	if !slices.Contains(enum, docs+"#not-found") || slices.Contains(enum, DefaultProblemDocs+"#not-found") {
		t.Errorf("served enum %q, want the types under %s", enum, docs)
	}
}
