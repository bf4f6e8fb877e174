package api

import (
	"encoding/json"
	"net/http"
	"reflect"
	"slices"
	"strconv"
	"strings"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/jobs"
	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// Every policy name a request carries is authorised against its token
// here, before any handler sees it, so that no route can forget one:
//
//   - the path's {policy} and every query parameter named "policy" or
//     ending in "_policy", by authorizeNamedPolicies for every request;
//   - every training.PolicyName in a JSON body, by bindJSON, the one way
//     handlers read JSON bodies.
//
// A token limited to some policies that names any other gets the same 403
// whether that policy exists or not, so answers tell nothing of other
// policies. The names are also kept on the request for the audit log.

// isPolicyQueryParam says whether a query parameter names a policy.
func isPolicyQueryParam(name string) bool {
	return name == "policy" || strings.HasSuffix(name, "_policy")
}

// authorizeNamedPolicies authorises the policies the path and query name.
func authorizeNamedPolicies(next echo.HandlerFunc) echo.HandlerFunc {
	return func(c echo.Context) error {
		if c.Param("policy") != "" {
			// An unescapable name is refused by the handler; it cannot
			// name a policy.
			if name, err := pathParam(c, "policy"); err == nil {
				if err := namePolicy(c, "", name); err != nil {
					return err
				}
			}
		}
		if c.Request().URL.RawQuery == "" {
			// Most API calls carry none: no parsing, no map.
			return next(c)
		}
		for key, values := range c.QueryParams() {
			if !isPolicyQueryParam(key) {
				continue
			}
			for _, v := range values {
				if err := namePolicy(c, key, v); err != nil {
					return err
				}
			}
		}
		return next(c)
	}
}

// namePolicy notes that the request names a policy, in field ("" for the
// path), and refuses it if the request's token does not cover it.
func namePolicy(c echo.Context, field, name string) error {
	if name == "" {
		return nil
	}
	if rc := stateOf(c); rc != nil && !slices.Contains(rc.policies, name) {
		rc.policies = append(rc.policies, name)
	}
	tok := requestToken(c)
	if tok == nil {
		return nil
	}
	var err error
	if field == "" {
		err = tok.AuthorizePolicy(name)
	} else {
		err = tok.AuthorizeNamed(field, name)
	}
	if err != nil {
		c.Response().Header().Set(echo.HeaderWWWAuthenticate, bearerRealm+`, error="insufficient_scope"`)
	}
	return err
}

// namedPolicies are the policies a request named, the path's first.
func namedPolicies(c echo.Context) []string {
	if rc := stateOf(c); rc != nil && len(rc.policies) > 0 {
		// A copy: the audit entry outlives the pooled context.
		return slices.Clone(rc.policies)
	}
	return nil
}

// authorizeBodyNames authorises every training.PolicyName in a decoded
// body, wherever it is nested.
func authorizeBodyNames(c echo.Context, body any) error {
	return walkPolicyNames(reflect.ValueOf(body), "", func(field, name string) error {
		return namePolicy(c, field, name)
	})
}

var policyNameType = reflect.TypeFor[training.PolicyName]()

// walkPolicyNames calls fn with the JSON path and value of every non-empty
// training.PolicyName in v.
func walkPolicyNames(v reflect.Value, path string, fn func(field, name string) error) error {
	switch v.Kind() {
	case reflect.Pointer, reflect.Interface:
		if v.IsNil() {
			return nil
		}
		return walkPolicyNames(v.Elem(), path, fn)
	case reflect.Struct:
		for i := range v.NumField() {
			f := v.Type().Field(i)
			name, _, _ := strings.Cut(f.Tag.Get("json"), ",")
			if !f.IsExported() || name == "-" {
				continue
			}
			if name == "" {
				name = f.Name
			}
			if f.Anonymous {
				name = ""
			}
			if err := walkPolicyNames(v.Field(i), joinField(path, name), fn); err != nil {
				return err
			}
		}
	case reflect.Slice, reflect.Array:
		if v.Type().Elem().Kind() == reflect.Uint8 {
			return nil // bytes, such as raw JSON, hold no names
		}
		for i := range v.Len() {
			if err := walkPolicyNames(v.Index(i), path+"["+strconv.Itoa(i)+"]", fn); err != nil {
				return err
			}
		}
	case reflect.Map:
		for it := v.MapRange(); it.Next(); {
			if err := walkPolicyNames(it.Value(), joinField(path, it.Key().String()), fn); err != nil {
				return err
			}
		}
	case reflect.String:
		if v.Type() == policyNameType && v.Len() > 0 {
			return fn(path, v.String())
		}
	}
	return nil
}

func joinField(path, name string) string {
	switch {
	case path == "":
		return name
	case name == "":
		return path
	}
	return path + "." + name
}

// authorizeJobNames authorises the policies a stored job's request names,
// so that a job queued by a wider token does not show them to a narrower.
func authorizeJobNames(c echo.Context, job jobs.View) error {
	var req any
	switch job.Kind {
	case jobs.EvaluationKind:
		req = &training.EvaluationRequest{}
	case jobs.ReplayKind:
		req = &training.ReplayRequest{}
	default:
		return nil
	}
	if err := json.Unmarshal(job.Request, req); err != nil {
		return echo.NewHTTPError(http.StatusInternalServerError, "a stored job request does not decode").SetInternal(err)
	}
	return authorizeBodyNames(c, req)
}

// coveredPolicies keeps the policies the request's token covers.
func coveredPolicies(c echo.Context, list []views.PolicyStatus) []views.PolicyStatus {
	if tok := requestToken(c); tok != nil {
		list = slices.DeleteFunc(list, func(st views.PolicyStatus) bool { return !tok.CoversPolicy(st.Name) })
	}
	return list
}
