package api

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"slices"
	"strconv"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/internal/metrics"
	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

func jsonEncode(w io.Writer, v any) error {
	return json.NewEncoder(w).Encode(v)
}

func handleLive() echo.HandlerFunc {
	return func(c echo.Context) error {
		return c.JSON(http.StatusOK, map[string]string{"status": "live"})
	}
}

func handleReady(r Readiness) echo.HandlerFunc {
	return func(c echo.Context) error {
		if err := r.Ready(c.Request().Context()); err != nil {
			if errors.Is(err, training.ErrUnavailable) {
				return echo.NewHTTPError(http.StatusServiceUnavailable, "not ready: "+err.Error())
			}
			return err
		}
		return c.JSON(http.StatusOK, map[string]string{"status": "ready"})
	}
}

// pathParam returns a path parameter unescaped. Echo matches on the raw
// path when the URL has one (so that an encoded slash stays inside its
// segment), and its parameters are then still escaped.
func pathParam(c echo.Context, name string) (string, error) {
	v := c.Param(name)
	if c.Request().URL.RawPath == "" {
		return v, nil
	}
	u, err := url.PathUnescape(v)
	if err != nil {
		return "", training.Invalid(-1, -1, name, "is not validly path-escaped")
	}
	return u, nil
}

// policyParam reads and checks the policy name of the path.
func policyParam(c echo.Context) (string, error) {
	name, err := pathParam(c, "policy")
	if err != nil {
		return "", err
	}
	if err := training.ValidatePolicyName(name); err != nil {
		return "", err
	}
	return name, nil
}

func handleListPolicies(p Policies) echo.HandlerFunc {
	type response struct {
		Policies []views.PolicyStatus `json:"policies"`
	}
	return func(c echo.Context) error {
		list, err := p.ListPolicyStatus(c.Request().Context())
		if err != nil {
			return err
		}
		// A token limited to some policies sees only those.
		list = coveredPolicies(c, list)
		if list == nil {
			list = []views.PolicyStatus{}
		}
		return c.JSON(http.StatusOK, response{Policies: list})
	}
}

func handleGetPolicy(p Policies) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		st, err := p.PolicyStatus(c.Request().Context(), name)
		if err != nil {
			return err
		}
		c.Response().Header().Set(headerETag, training.SettingsETag(st.Policy))
		return c.JSON(http.StatusOK, st)
	}
}

// handlePutPolicy creates a policy or replaces all its settings: fields the
// client leaves out take their defaults. Replacing needs If-Match with the
// settings' ETag, so that no client overwrites settings it has not seen.
func handlePutPolicy(p Policies, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		settings := training.DefaultSettings()
		if err = bindJSON(c, cfg.MaxBodyBytes, &settings); err != nil {
			return err
		}
		if err = settings.Validate(); err != nil {
			return err
		}
		policy, created, err := p.ChangePolicy(c.Request().Context(), name, training.SettingsChange{
			IfMatch: c.Request().Header.Get("If-Match"), Replace: &settings, By: access.ActorOf(requestToken(c))})
		if err != nil {
			return err
		}
		status := http.StatusOK
		if created {
			status = http.StatusCreated
		}
		c.Response().Header().Set(headerETag, training.SettingsETag(policy))
		return c.JSON(status, policy)
	}
}

const (
	mediaMergePatch = "application/merge-patch+json"
	headerETag      = "ETag"
)

// handlePatchPolicy changes the settings a JSON merge patch (RFC 7396)
// names and keeps the others; null gives a setting its default again.
// If-Match is optional: a patch overwrites only what it names.
func handlePatchPolicy(p Policies, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		patch, _, err := readBody(c, cfg.MaxBodyBytes, mediaMergePatch)
		if err != nil {
			return err
		}
		var fields map[string]json.RawMessage
		if err = decodeStrict(patch, &fields, -1); err != nil {
			return err
		}
		if fields == nil {
			return training.Invalid(-1, -1, "", "a settings patch must be a JSON object")
		}
		apply := func(current training.Settings) (training.Settings, error) {
			doc, encodeErr := json.Marshal(current)
			if encodeErr != nil {
				return current, fmt.Errorf("encode settings: %w", encodeErr)
			}
			merged, encodeErr := training.MergePatch(doc, patch)
			if encodeErr != nil {
				return current, fmt.Errorf("apply merge patch: %w", encodeErr)
			}
			next := training.DefaultSettings()
			return next, decodeStrict(merged, &next, -1)
		}
		policy, _, err := p.ChangePolicy(c.Request().Context(), name, training.SettingsChange{
			IfMatch: c.Request().Header.Get("If-Match"), Patch: apply, By: access.ActorOf(requestToken(c))})
		if err != nil {
			return err
		}
		c.Response().Header().Set(headerETag, training.SettingsETag(policy))
		return c.JSON(http.StatusOK, policy)
	}
}

type settingsHistoryResponse struct {
	Changes    []training.SettingsChangeRecord `json:"changes"`
	NextCursor string                          `json:"next_cursor,omitempty"`
}

func handleSettingsHistory(h SettingsHistory) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		limit := training.DefaultHistoryPage
		if s := c.QueryParam("limit"); s != "" {
			n, parseErr := strconv.Atoi(s)
			if parseErr != nil || n < 1 || n > training.MaxHistoryPage {
				return training.Invalid(-1, -1, "limit", "must be a whole number from 1 to %d", training.MaxHistoryPage)
			}
			limit = n
		}
		var before int64
		if s := c.QueryParam("cursor"); s != "" {
			n, parseErr := strconv.ParseInt(s, 10, 64)
			if parseErr != nil || n < 1 {
				return training.Invalid(-1, -1, "cursor", "is not a cursor this service handed out; start the listing again without it")
			}
			before = n
		}
		page, err := h.SettingsHistory(c.Request().Context(), name, before, limit)
		if err != nil {
			return err
		}
		res := settingsHistoryResponse{Changes: page.Changes}
		if res.Changes == nil {
			res.Changes = []training.SettingsChangeRecord{}
		}
		if page.Next > 0 {
			res.NextCursor = strconv.FormatInt(page.Next, 10)
		}
		return c.JSON(http.StatusOK, res)
	}
}

// handleEraseEpisode deletes one episode's stored record.
func handleEraseEpisode(e Eraser) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		id, err := pathParam(c, "episode")
		if err != nil {
			return err
		}
		if err := e.EraseEpisode(c.Request().Context(), name, id); err != nil {
			return err
		}
		return c.NoContent(http.StatusNoContent)
	}
}

// handleDeletePolicy deletes a policy with everything it owns.
func handleDeletePolicy(e Eraser) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		if err := e.DeletePolicy(c.Request().Context(), name); err != nil {
			return err
		}
		return c.NoContent(http.StatusNoContent)
	}
}

func handlePostEpisodes(e Episodes, m *metrics.Metrics, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		body, media, err := readBody(c, cfg.MaxBodyBytes, mediaJSON, mediaNDJSON)
		if err != nil {
			return err
		}
		episodes, err := decodeEpisodes(body, media)
		var undecoded *undecodedBatch
		if errors.As(err, &undecoded) && undecoded.episodes != nil {
			err = refuseUndecoded(c.Request().Context(), e, name, undecoded)
			var verr *training.ValidationError
			if errors.As(err, &verr) {
				m.EpisodesRejected.WithLabelValues(name).Add(float64(len(undecoded.episodes)))
			}
		}
		if err != nil {
			return err
		}
		res, err := e.Ingest(c.Request().Context(), name, episodes)
		var verr *training.ValidationError
		if errors.As(err, &verr) {
			m.EpisodesRejected.WithLabelValues(name).Add(float64(len(episodes)))
		}
		if err != nil {
			return err
		}
		m.EpisodesReceived.WithLabelValues(name).Add(float64(res.Accepted))
		m.EpisodesDuplicate.WithLabelValues(name).Add(float64(res.Duplicates))
		return c.JSON(http.StatusAccepted, res)
	}
}

// refuseUndecoded adds to the problems of a batch that did not decode those
// the policy finds in the rest of it, leaving out what it says of values
// that did not decode (a field that failed to decode is not also missing).
func refuseUndecoded(ctx context.Context, e Episodes, policy string, b *undecodedBatch) error {
	err := e.CheckEpisodes(ctx, policy, b.episodes)
	var verr *training.ValidationError
	if err != nil && !errors.As(err, &verr) {
		return err
	}
	problems := slices.Clone(b.problems)
	if verr != nil {
		for _, p := range verr.Problems {
			if !slices.ContainsFunc(b.problems, func(d training.FieldError) bool { return undecodedAt(d, p) }) {
				problems = append(problems, p)
			}
		}
	}
	// In the order of the batch: its episodes, their steps.
	slices.SortStableFunc(problems, func(a, b training.FieldError) int {
		return cmp.Or(cmp.Compare(a.Episode, b.Episode), cmp.Compare(a.Step, b.Step))
	})
	return training.Refuse(problems)
}

// undecodedAt reports whether a decoding problem d left the value p is
// about undecoded: the same field, or the whole step, steps or episode
// holding it.
func undecodedAt(d, p training.FieldError) bool {
	switch {
	case d.Episode != p.Episode || d.Episode < 0:
		return false
	case d.Step < 0 && d.Field == "":
		return true
	case d.Step < 0 && d.Field == "steps":
		return p.Step >= 0 || p.Field == "steps"
	default:
		return d.Step == p.Step && (d.Field == "" || d.Field == p.Field)
	}
}

type chooseRequest struct {
	State   string        `json:"state"`
	Mode    training.Mode `json:"mode"`
	Allowed []string      `json:"allowed"`
	// Episode names an open episode to record the decision in, as its
	// decision number Step (from 0); without it nothing is recorded.
	Episode string `json:"episode"`
	Step    *int   `json:"step"`
}

type chooseResponse struct {
	Action       string  `json:"action"`
	Probability  float64 `json:"probability"`
	Explored     bool    `json:"explored"`
	GreedyAction string  `json:"greedy_action"`
	KnownState   bool    `json:"known_state"`
	// Allowed is the set the action was chosen from; posted with the step
	// (beside the probability), it lets evaluation recompute the choice.
	Allowed []string `json:"allowed"`
	// Visits is how often the chosen action was tried in the state.
	Visits int64 `json:"visits"`
	// Fallback is true when the action is the policy's greedy_fallback.
	Fallback bool  `json:"fallback"`
	Revision int64 `json:"revision"`
	// CopyAgeSeconds is how long ago this process last confirmed its
	// in-memory copy was current.
	CopyAgeSeconds float64 `json:"copy_age_seconds"`
	// Episode and Step repeat where the decision was recorded; Repeated
	// says the step was recorded before and this is that answer.
	Episode  string `json:"episode,omitempty"`
	Step     *int   `json:"step,omitempty"`
	Repeated *bool  `json:"repeated,omitempty"`
}

func handleChoose(ch Chooser, rec RecordedChooser, m *metrics.Metrics, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		body, _, err := readBody(c, cfg.MaxBodyBytes, mediaJSON)
		if err != nil {
			return err
		}
		req := chooseRequest{Mode: training.Greedy}
		if err = decodeFast(body, &req, -1); err != nil {
			return err
		}
		if err = validateChoose(req, cfg); err != nil {
			return err
		}
		chooseReq := training.ChooseRequest{State: req.State, Mode: req.Mode, Allowed: req.Allowed}
		if req.Episode != "" {
			return chooseRecorded(c, rec, m, name, req, chooseReq)
		}
		res, err := ch.Choose(c.Request().Context(), name, chooseReq)
		if err != nil {
			return err
		}
		m.CountChoice(name, string(req.Mode), res.Explored, res.KnownState)
		return writeChooseAnswer(c, newChooseResponse(res))
	}
}

func newChooseResponse(res training.ChooseResult) chooseResponse {
	return chooseResponse{
		Action: res.Action, Probability: res.Probability, Explored: res.Explored,
		GreedyAction: res.GreedyAction, KnownState: res.KnownState, Allowed: res.Allowed, Visits: res.Visits, Fallback: res.Fallback,
		Revision: res.Revision, CopyAgeSeconds: res.Staleness.Seconds(),
	}
}

// chooseRecorded answers a choose that names an open episode once its
// decision is durably recorded (or with the decision recorded before).
func chooseRecorded(c echo.Context, rec RecordedChooser, m *metrics.Metrics, name string, req chooseRequest, chooseReq training.ChooseRequest) error {
	res, err := rec.ChooseRecorded(c.Request().Context(), name, req.Episode, *req.Step, chooseReq)
	if err != nil {
		return err
	}
	if res.Repeated {
		m.Open.DecisionsRepeated.WithLabelValues(name).Inc()
	} else {
		m.Open.DecisionsRecorded.WithLabelValues(name).Inc()
		m.CountChoice(name, string(req.Mode), res.Explored, res.KnownState)
	}
	out := newChooseResponse(res.ChooseResult)
	out.Episode, out.Step, out.Repeated = res.Episode, &res.Step, &res.Repeated
	return writeChooseAnswer(c, out)
}

func validateChoose(req chooseRequest, cfg Config) error {
	if err := training.ValidateStateName(req.State, cfg.MaxStateLength); err != nil {
		return err
	}
	switch {
	case req.Mode != training.Explore && req.Mode != training.Greedy:
		return training.Invalid(-1, -1, "mode", "must be %q or %q", training.Explore, training.Greedy)
	case req.Allowed != nil && len(req.Allowed) == 0:
		return training.Invalid(-1, -1, "allowed", "must name at least one action when given")
	case req.Step != nil && req.Episode == "":
		return training.Invalid(-1, -1, "episode", "is missing: a step number is given only with the open episode it belongs to")
	case req.Episode == "":
		return nil
	case req.Step == nil:
		return training.Invalid(-1, -1, "step", "is missing: a decision recorded in an open episode needs its step number (0 for the first)")
	case *req.Step < 0:
		return training.Invalid(-1, -1, "step", "must be 0 or more, got %d", *req.Step)
	}
	return training.ValidateEpisodeID("episode", req.Episode, cfg.MaxIDLength)
}

func handleGetState(s States, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		state, err := pathParam(c, "state")
		if err != nil {
			return err
		}
		if err = training.ValidateStateName(state, cfg.MaxStateLength); err != nil {
			return err
		}
		view, err := s.State(c.Request().Context(), name, state)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, view)
	}
}
