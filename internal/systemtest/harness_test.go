package systemtest

import (
	"context"
	"io"
	"os"
	"strings"
	"testing"

	"github.com/getkin/kin-openapi/openapi3filter"

	"github.com/qtally/qtally/cmd/qtally/commands"
	"github.com/qtally/qtally/storage/pgtest"
)

func TestMain(m *testing.M) {
	// The tests read the repository's files (the OpenAPI document, deploy
	// files, docs) by their paths from its root, and build from there.
	if err := os.Chdir("../.."); err != nil {
		panic(err)
	}
	openapi3filter.RegisterBodyDecoder("application/x-ndjson", openapi3filter.PlainBodyDecoder)
	openapi3filter.RegisterBodyDecoder("text/html", openapi3filter.PlainBodyDecoder)
	pgtest.Main(m)
}

// run is the qtally program as the tests run it: in this process, with
// the arguments, environment and output they give and no standard input.
func run(ctx context.Context, args []string, getenv func(string) string, stdout, stderr io.Writer) error {
	return commands.Run(ctx, args, getenv, strings.NewReader(""), stdout, stderr)
}

// testPepper keys the token digests of every service and token command the
// tests run: the service refuses to check tokens without a real pepper.
const testPepper = "pepper-of-the-tests-0123456789abcdef"
