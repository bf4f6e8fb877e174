package training

import "strings"

// jsonName is the field name of a json struct tag ("-" for ignored fields).
func jsonName(tag string) string {
	name, _, _ := strings.Cut(tag, ",")
	if name == "" {
		return "-"
	}
	return name
}

// fieldPath drops the struct name from a validator namespace:
// "Settings.actions[2]" becomes "actions[2]".
func fieldPath(namespace string) string {
	_, rest, found := strings.Cut(namespace, ".")
	if !found {
		return namespace
	}
	return rest
}

func containsVerb(format string) bool { return strings.Contains(format, "%s") }
