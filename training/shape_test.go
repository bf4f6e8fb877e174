package training

import "testing"

// Checking a state that fits costs no allocation: choose checks every state.
func TestStateShapeCheckDoesNotAllocate(t *testing.T) {
	lo, hi := int64(0), int64(30)
	sh := &StateShape{Fields: []StateField{{Name: "day", Min: &lo, Max: &hi}, {Name: "reason", Values: []string{"low_balance", "bank_refused"}}}}
	if p := sh.Problem("day=30|reason=bank_refused"); p != "" {
		t.Fatalf("a fitting state refused: %s", p)
	}
	if n := testing.AllocsPerRun(100, func() { _ = sh.Problem("day=7|reason=low_balance") }); n != 0 {
		t.Fatalf("%v allocations per check", n)
	}
	for _, bad := range []string{"", "day=7", "day=7|reason=low_balance|", "day=-1|reason=low_balance", "day=7|reason=", "x=7|reason=low_balance"} {
		if sh.Problem(bad) == "" {
			t.Errorf("%q fits", bad)
		}
	}
}
