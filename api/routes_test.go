package api

import (
	"regexp"
	"testing"

	"github.com/getkin/kin-openapi/openapi3"
	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/access"
)

// Every route the server registers is an operation of the OpenAPI
// document and the other way round, so that the whole-system access test,
// which walks the document, reaches every route.
func TestEveryRouteIsDocumented(t *testing.T) {
	e := NewServer(Config{}, Deps{Auth: access.NewKeyring(nil, "")}).(*echo.Echo)
	doc, err := openapi3.NewLoader().LoadFromData(OpenAPIDocument)
	if err != nil {
		t.Fatal(err)
	}
	param := regexp.MustCompile(`:(\w+)`)
	served := map[string]bool{}
	for _, r := range e.Routes() {
		path := param.ReplaceAllString(r.Path, "{$1}")
		served[r.Method+" "+path] = true
		if item := doc.Paths.Value(path); item == nil || item.GetOperation(r.Method) == nil {
			t.Errorf("%s %s is served but not in the OpenAPI document", r.Method, path)
		}
	}
	for _, path := range doc.Paths.InMatchingOrder() {
		for method := range doc.Paths.Value(path).Operations() {
			if !served[method+" "+path] {
				t.Errorf("%s %s is in the OpenAPI document but not served", method, path)
			}
		}
	}
	if len(served) < 20 {
		t.Fatalf("only %d routes served", len(served))
	}
}
