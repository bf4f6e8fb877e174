package storage_test

import (
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

func TestMain(m *testing.M) {
	pgtest.Main(m)
}
