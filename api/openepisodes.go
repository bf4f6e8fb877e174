package api

import (
	"bytes"
	"io"
	"net/http"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/metrics"
	"github.com/qtally/qtally/training"
)

// episodeParam reads and checks the open episode's id of the path.
func episodeParam(c echo.Context, cfg Config) (string, error) {
	id, err := pathParam(c, "episode")
	if err != nil {
		return "", err
	}
	return id, training.ValidateEpisodeID("episode", id, cfg.MaxIDLength)
}

// openEpisodeParams reads the policy and the open episode a route names.
func openEpisodeParams(c echo.Context, cfg Config) (policy, episode string, err error) {
	if policy, err = policyParam(c); err != nil {
		return "", "", err
	}
	episode, err = episodeParam(c, cfg)
	return policy, episode, err
}

func handleAddReward(o OpenEpisodes, m *metrics.Metrics, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, episode, err := openEpisodeParams(c, cfg)
		if err != nil {
			return err
		}
		var add training.RewardAddition
		if err = bindJSON(c, cfg.MaxBodyBytes, &add); err != nil {
			return err
		}
		if err = add.Validate(cfg.MaxIDLength); err != nil {
			return err
		}
		res, err := o.AddReward(c.Request().Context(), name, episode, add)
		if err != nil {
			return err
		}
		if !res.Repeated {
			m.Open.RewardsAdded.WithLabelValues(name).Inc()
		}
		return c.JSON(http.StatusOK, res)
	}
}

func handleEndEpisode(o OpenEpisodes, m *metrics.Metrics, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, episode, err := openEpisodeParams(c, cfg)
		if err != nil {
			return err
		}
		var req training.EndRequest
		if err = bindOptionalJSON(c, cfg.MaxBodyBytes, &req); err != nil {
			return err
		}
		if err = req.Validate(); err != nil {
			return err
		}
		res, err := o.EndOpenEpisode(c.Request().Context(), name, episode, req)
		if err != nil {
			return err
		}
		if !res.AlreadyEnded {
			m.Open.Closed.WithLabelValues(name, metrics.ClosedEnded).Inc()
		}
		return c.JSON(http.StatusOK, res)
	}
}

func handleGetOpenEpisode(o OpenEpisodes, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, episode, err := openEpisodeParams(c, cfg)
		if err != nil {
			return err
		}
		v, err := o.OpenEpisode(c.Request().Context(), name, episode)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, v)
	}
}

// bindOptionalJSON binds a JSON body when the request has one: an empty
// body leaves v as it is, whatever the Content-Type.
func bindOptionalJSON(c echo.Context, limit int64, v any) error {
	req := c.Request()
	if req.ContentLength == 0 {
		return nil
	}
	var first [1]byte
	n, _ := io.ReadFull(req.Body, first[:])
	if n == 0 {
		return nil
	}
	req.Body = io.NopCloser(io.MultiReader(bytes.NewReader(first[:n]), req.Body))
	return bindJSON(c, limit, v)
}
