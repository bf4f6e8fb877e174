package training

import (
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strings"
	"time"
)

// Errors of conditional settings changes.
var (
	// ErrPreconditionRequired: the change would overwrite settings the
	// client has not shown it has seen (no If-Match).
	ErrPreconditionRequired = errors.New("precondition required")
	// ErrPreconditionFailed: the settings changed since the client read them.
	ErrPreconditionFailed = errors.New("precondition failed")
)

// AnyETag is the If-Match value that matches whatever settings exist.
const AnyETag = "*"

// SettingsETag is the entity tag of a policy's settings: a digest of the
// policy's id and its settings as JSON, so that it changes with any setting
// (fields added later included) and differs between policies.
func SettingsETag(p Policy) string {
	data, err := json.Marshal(p.Settings)
	if err != nil {
		panic("settings always encode: " + err.Error())
	}
	h := sha256.New()
	_ = binary.Write(h, binary.BigEndian, p.ID)
	h.Write(data)
	return `"` + hex.EncodeToString(h.Sum(nil)[:12]) + `"`
}

// ChangeKind says how settings were changed.
type ChangeKind string

const (
	ChangeCreate  ChangeKind = "create"
	ChangeReplace ChangeKind = "replace"
	ChangePatch   ChangeKind = "patch"
)

// Actor is who made a change: a token, or nobody when authentication is off.
type Actor struct {
	TokenID    *int64
	TokenLabel string
}

// SettingsChange is a request to create a policy or change its settings.
// Exactly one of Replace and Patch is set.
type SettingsChange struct {
	// IfMatch is the entity tag the client saw ("" when it sent none,
	// AnyETag for any). Replacing existing settings needs one; a patch
	// checks it when given.
	IfMatch string
	// Replace holds the new settings whole (PUT).
	Replace *Settings
	// Patch computes the new settings from the current ones (PATCH).
	Patch func(current Settings) (Settings, error)
	By    Actor
	// Unconditional skips the If-Match rules (tests and tools that own the
	// policy outright).
	Unconditional bool
}

// Resolve checks the change's precondition against the stored policy (nil
// when none exists) and returns the validated new settings and the kind of
// change.
func (c SettingsChange) Resolve(name string, current *Policy) (Settings, ChangeKind, error) {
	if current == nil {
		switch {
		case c.Patch != nil:
			return Settings{}, "", NotFoundf("no policy named %q; create it with PUT", name)
		case c.IfMatch != "" && !c.Unconditional:
			return Settings{}, "", &kindError{ErrPreconditionFailed, fmt.Sprintf("policy %q does not exist, so If-Match %s cannot match; send the PUT without If-Match to create it", name, c.IfMatch)}
		}
		return *c.Replace, ChangeCreate, c.Replace.Validate()
	}
	etag := SettingsETag(*current)
	if !c.Unconditional {
		switch {
		case c.IfMatch == "" && c.Patch == nil:
			return Settings{}, "", &kindError{ErrPreconditionRequired, fmt.Sprintf("policy %q exists: a PUT replaces every setting, so send If-Match: %s (the ETag of GET /v1/policies/%s), or change single settings with PATCH", name, etag, name)}
		case c.IfMatch != "" && c.IfMatch != AnyETag && !etagListHas(c.IfMatch, etag):
			return Settings{}, "", &kindError{ErrPreconditionFailed, fmt.Sprintf("the settings of policy %q changed since If-Match %s was read; they are now %s: read them again and redo the change", name, c.IfMatch, etag)}
		}
	}
	if c.Patch == nil {
		return *c.Replace, ChangeReplace, c.Replace.Validate()
	}
	next, err := c.Patch(current.Settings)
	if err != nil {
		return Settings{}, "", err
	}
	return next, ChangePatch, next.Validate()
}

// etagListHas reports whether an If-Match list ("a", "b") names etag.
// Weak tags never match: If-Match uses strong comparison (RFC 9110, 13.1.1).
func etagListHas(list, etag string) bool {
	for _, t := range strings.Split(list, ",") {
		if strings.TrimSpace(t) == etag {
			return true
		}
	}
	return false
}

// SettingDiff is one setting's old and new value, as JSON (null: unset).
type SettingDiff struct {
	Field string          `json:"field"`
	Old   json.RawMessage `json:"old"`
	New   json.RawMessage `json:"new"`
}

// DiffSettings lists the settings that differ, by JSON field name; old is
// nil for a policy being created.
func DiffSettings(old *Settings, next Settings) []SettingDiff {
	before := map[string]json.RawMessage{}
	if old != nil {
		before = settingsFields(*old)
	}
	after := settingsFields(next)
	var names []string
	for k := range before {
		names = append(names, k)
	}
	for k := range after {
		if _, ok := before[k]; !ok {
			names = append(names, k)
		}
	}
	slices.Sort(names)
	var out []SettingDiff
	for _, k := range names {
		o, n := orNull(before[k]), orNull(after[k])
		if !bytes.Equal(o, n) {
			out = append(out, SettingDiff{Field: k, Old: o, New: n})
		}
	}
	return out
}

func settingsFields(s Settings) map[string]json.RawMessage {
	data, err := json.Marshal(s)
	if err != nil {
		panic("settings always encode: " + err.Error())
	}
	var m map[string]json.RawMessage
	if err := json.Unmarshal(data, &m); err != nil {
		panic("settings encode as an object: " + err.Error())
	}
	return m
}

func orNull(v json.RawMessage) json.RawMessage {
	if v == nil {
		return json.RawMessage("null")
	}
	return v
}

// SettingsChangeRecord is one recorded change of a policy's settings.
type SettingsChangeRecord struct {
	ID         int64         `json:"id"`
	ChangedAt  time.Time     `json:"changed_at"`
	Kind       ChangeKind    `json:"kind"`
	TokenID    *int64        `json:"token_id"`
	TokenLabel string        `json:"token_label,omitempty"`
	Fields     []SettingDiff `json:"fields"`
}

// SettingsHistoryPage is one page of a policy's settings changes, newest
// first; Next continues after the change of that id (0: last page).
type SettingsHistoryPage struct {
	Changes []SettingsChangeRecord
	Next    int64
}

// Page sizes of the settings history.
const (
	DefaultHistoryPage = 50
	MaxHistoryPage     = 500
)

// MergePatch applies an RFC 7396 JSON merge patch to a JSON document.
func MergePatch(doc, patch []byte) ([]byte, error) {
	target, err := decodeNumbers(doc)
	if err != nil {
		return nil, fmt.Errorf("merge patch target: %w", err)
	}
	p, err := decodeNumbers(patch)
	if err != nil {
		return nil, fmt.Errorf("merge patch: %w", err)
	}
	return json.Marshal(mergeValue(target, p))
}

// decodeNumbers decodes JSON keeping numbers as written, so that a patch
// passes them on unchanged.
func decodeNumbers(data []byte) (any, error) {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.UseNumber()
	var v any
	err := dec.Decode(&v)
	return v, err
}

// mergeValue is MergePatch(Target, Patch) of RFC 7396, section 2.
func mergeValue(target, patch any) any {
	po, ok := patch.(map[string]any)
	if !ok {
		return patch
	}
	to, ok := target.(map[string]any)
	if !ok {
		to = map[string]any{}
	}
	for k, v := range po {
		if v == nil {
			delete(to, k)
		} else {
			to[k] = mergeValue(to[k], v)
		}
	}
	return to
}
