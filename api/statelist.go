package api

import (
	"encoding/base64"
	"encoding/json"
	"net/http"
	"slices"
	"strconv"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

type statesResponse struct {
	States []views.StateSummary `json:"states"`
	// NextCursor continues the listing; absent on its last page.
	NextCursor string `json:"next_cursor,omitempty"`
}

// stateListing is a page of states as a request asked for it: the policy
// of its path, the query of its parameters and what they found.
type stateListing struct {
	policy string
	query  views.StateQuery
	views.StatePage
}

// listStates reads the page of states a request asks for; the JSON route
// and the status page share it.
func listStates(c echo.Context, s States) (stateListing, error) {
	name, err := policyParam(c)
	if err != nil {
		return stateListing{}, err
	}
	q, err := bindStateQuery(c)
	if err != nil {
		return stateListing{}, err
	}
	page, err := s.ListStates(c.Request().Context(), name, q)
	return stateListing{policy: name, query: q, StatePage: page}, err
}

func handleListStates(s States) echo.HandlerFunc {
	return func(c echo.Context) error {
		page, err := listStates(c, s)
		if err != nil {
			return err
		}
		res := statesResponse{States: page.States, NextCursor: encodeCursor(page.Next)}
		if res.States == nil {
			res.States = []views.StateSummary{}
		}
		return c.JSON(http.StatusOK, res)
	}
}

// bindStateQuery reads sort, limit and cursor of a state listing.
func bindStateQuery(c echo.Context) (views.StateQuery, error) {
	q := views.StateQuery{Order: views.ByVisits, Limit: views.DefaultStatePage}
	if s := c.QueryParam("sort"); s != "" {
		q.Order = views.StateOrder(s)
		if !slices.Contains(views.StateOrders, q.Order) {
			return q, training.Invalid(-1, -1, "sort", "%q is not a sort order; use one of %q", training.Truncate(s, 64), views.StateOrders)
		}
	}
	if s := c.QueryParam("limit"); s != "" {
		n, err := strconv.Atoi(s)
		if err != nil || n < 1 || n > views.MaxStatePage {
			return q, training.Invalid(-1, -1, "limit", "must be a whole number from 1 to %d", views.MaxStatePage)
		}
		q.Limit = n
	}
	if s := c.QueryParam("cursor"); s != "" {
		k, err := decodeCursor(s)
		if err != nil {
			return q, training.Invalid(-1, -1, "cursor", "is not a cursor this service handed out; start the listing again without it")
		}
		if k.Order != q.Order {
			return q, training.Invalid(-1, -1, "cursor", "continues a listing sorted by %q, not by %q", k.Order, q.Order)
		}
		q.After = &k
	}
	return q, nil
}

// Cursors are opaque to clients: the key of the last state of a page, as
// unpadded base64url JSON.
func encodeCursor(k *views.StateKey) string {
	if k == nil {
		return ""
	}
	data, err := json.Marshal(k)
	if err != nil {
		panic("a state key always encodes: " + err.Error())
	}
	return base64.RawURLEncoding.EncodeToString(data)
}

func decodeCursor(s string) (views.StateKey, error) {
	var k views.StateKey
	data, err := base64.RawURLEncoding.DecodeString(s)
	if err != nil {
		return k, err
	}
	return k, json.Unmarshal(data, &k)
}
