package api

import (
	_ "embed"
	"net/http"

	"github.com/labstack/echo/v4"
)

// OpenAPIDocument describes the HTTP API; tests validate real requests
// and responses against it so it cannot drift from the code.
//
//go:embed openapi.json
var OpenAPIDocument []byte

func handleOpenAPI(problemDocs string) echo.HandlerFunc {
	doc := openAPIDocument(problemDocs)
	return func(c echo.Context) error {
		return c.Blob(http.StatusOK, echo.MIMEApplicationJSON, doc)
	}
}
