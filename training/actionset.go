package training

// ActionSet is a set of a policy's actions as a bitmask over their
// indexes: action i is in the set when bit i%8 of byte i/8 is 1. A policy
// of n actions needs ActionSetWidth(n) bytes (128 for the most, 1024), so a
// step's allowed set costs a byte per eight actions in storage, and reading
// whether an action is in it costs no lookup.
type ActionSet []byte

// ActionSetWidth is the bytes of an ActionSet over n actions.
func ActionSetWidth(n int) int { return (n + 7) / 8 }

// Has reports whether action a is in the set.
func (s ActionSet) Has(a int16) bool {
	i := int(a)
	return i >= 0 && i/8 < len(s) && s[i/8]&(1<<(i%8)) != 0
}

// add puts action a in the set and reports whether it was not in already.
func (s ActionSet) add(a int16) bool {
	bit := byte(1) << (a % 8)
	if s[a/8]&bit != 0 {
		return false
	}
	s[a/8] |= bit
	return true
}

// empty holds for a set without any action.
func (s ActionSet) empty() bool {
	for _, b := range s {
		if b != 0 {
			return false
		}
	}
	return true
}

// AllowedAt is the set step t of the episode was chosen from, or nil when
// the client gave none (every action was allowed, as far as anyone knows).
func (r EpisodeRecord) AllowedAt(t int) ActionSet {
	if r.Allowed == nil {
		return nil
	}
	w := len(r.Allowed) / len(r.States)
	set := ActionSet(r.Allowed[t*w : (t+1)*w : (t+1)*w])
	if set.empty() {
		return nil
	}
	return set
}

// StepsWithoutAllowed counts the steps that carry no allowed set.
func (r EpisodeRecord) StepsWithoutAllowed() int {
	if r.Allowed == nil {
		return len(r.States)
	}
	n := 0
	for t := range r.States {
		if r.AllowedAt(t) == nil {
			n++
		}
	}
	return n
}
