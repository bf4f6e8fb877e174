package training

import (
	"fmt"
	"slices"
	"strconv"
	"strings"
)

// Limits of a state shape.
const (
	MaxShapeFields = 32
	MaxShapeValues = 1000
)

// StateShape is the form every state of a policy must have: its fields in
// order, as name=value, joined by the separator, e.g. "day=3|reason=low_balance".
// It keeps a client's bug from growing the table without bound and keeps
// identifiers out of state names.
type StateShape struct {
	// Separator joins the fields; "|" when empty.
	Separator string       `json:"separator,omitempty"`
	Fields    []StateField `json:"fields"`
}

// StateField is one field of a state: one of Values, or an integer from
// Min to Max.
type StateField struct {
	Name   string   `json:"name"`
	Values []string `json:"values,omitempty"`
	Min    *int64   `json:"min,omitempty"`
	Max    *int64   `json:"max,omitempty"`
}

func (sh *StateShape) separator() string {
	if sh.Separator == "" {
		return "|"
	}
	return sh.Separator
}

// check reports every problem of the shape itself.
func (sh *StateShape) check(l *problemList) {
	sep := sh.separator()
	if len(sh.Fields) == 0 || len(sh.Fields) > MaxShapeFields {
		l.add(-1, -1, "state_shape.fields", "must hold 1 to %d fields", MaxShapeFields)
	}
	if strings.Contains(sep, "=") {
		l.add(-1, -1, "state_shape.separator", "must not contain '='")
	}
	bad := func(s string) bool { return s == "" || strings.Contains(s, sep) || !printableName(s) }
	seen := map[string]bool{}
	for i, f := range sh.Fields {
		field := fmt.Sprintf("state_shape.fields[%d]", i)
		switch {
		case bad(f.Name) || strings.Contains(f.Name, "="):
			l.add(-1, -1, field, "name must be non-empty, printable, without '=' or the separator %q", sep)
		case seen[f.Name]:
			l.add(-1, -1, field, "repeats the name %q", Truncate(f.Name, 64))
		}
		seen[f.Name] = true
		ranged := f.Min != nil || f.Max != nil
		switch {
		case ranged && len(f.Values) > 0:
			l.add(-1, -1, field, "takes either values or min and max, not both")
		case ranged && (f.Min == nil || f.Max == nil || *f.Min > *f.Max):
			l.add(-1, -1, field, "needs min and max with min <= max")
		case !ranged && (len(f.Values) == 0 || len(f.Values) > MaxShapeValues):
			l.add(-1, -1, field, "needs 1 to %d values, or min and max", MaxShapeValues)
		}
		for j, v := range f.Values {
			if bad(v) || slices.Contains(f.Values[:j], v) {
				l.add(-1, -1, field, "value %d must be non-empty, printable, unique and without the separator %q", j, sep)
			}
		}
	}
}

// Problem says how a state does not fit the shape, or "" when it does. It
// does not allocate for a state that fits.
func (sh *StateShape) Problem(state string) string {
	sep := sh.separator()
	rest := state
	for i, f := range sh.Fields {
		if i > 0 {
			var found bool
			if _, rest, found = strings.Cut(rest, sep); !found {
				return fmt.Sprintf("lacks field %q: it has %d fields, the policy's state_shape %d (%s)", f.Name, i, len(sh.Fields), sh.names())
			}
		}
		part, _, _ := strings.Cut(rest, sep)
		name, value, found := strings.Cut(part, "=")
		if !found || name != f.Name {
			return fmt.Sprintf("field %d must be %q=value (state_shape: %s)", i+1, f.Name, sh.names())
		}
		if len(f.Values) > 0 {
			if !slices.Contains(f.Values, value) {
				return fmt.Sprintf("field %q is %q, not one of the values the policy's state_shape lists", f.Name, Truncate(value, 64))
			}
		} else if n, err := strconv.ParseInt(value, 10, 64); err != nil || n < *f.Min || n > *f.Max {
			return fmt.Sprintf("field %q must be an integer from %d to %d, got %q", f.Name, *f.Min, *f.Max, Truncate(value, 64))
		}
	}
	if strings.Contains(rest, sep) {
		return fmt.Sprintf("has more than the %d fields of the policy's state_shape (%s)", len(sh.Fields), sh.names())
	}
	return ""
}

func (sh *StateShape) names() string {
	names := make([]string, len(sh.Fields))
	for i, f := range sh.Fields {
		names[i] = f.Name
	}
	return strings.Join(names, sh.separator())
}

// CheckState refuses a state given on its own (to choose) that does not
// fit the settings' shape.
func (s Settings) CheckState(state string) error {
	if s.StateShape == nil {
		return nil
	}
	if problem := s.StateShape.Problem(state); problem != "" {
		return Invalid(-1, -1, "state", "%s", problem)
	}
	return nil
}
