package training

import (
	"errors"
	"fmt"
	"math"
	"reflect"
	"slices"
	"time"
	"unicode"
	"unicode/utf8"

	"github.com/go-playground/validator/v10"
)

// VisitRule says which occurrences of a pair in an episode update it.
type VisitRule string

const (
	// FirstVisit updates a pair once per episode, from its earliest occurrence.
	FirstVisit VisitRule = "first"
	// EveryVisit updates a pair at every occurrence.
	EveryVisit VisitRule = "every"
)

// Limits on action names and on the number of actions of a policy.
const (
	MinActions       = 2
	MaxActions       = 1024
	MaxActionNameLen = 128
	MaxPolicyNameLen = 64
)

// Settings are the learning parameters a client chooses for a policy.
type Settings struct {
	// Actions are the policy's action names; their order is the index order
	// used in storage, so it cannot change once anything is stored.
	Actions []string  `json:"actions" validate:"min=2,max=1024,unique,dive,required,max=128,actionname"`
	Gamma   float64   `json:"gamma" validate:"gte=0,lte=1"`
	Alpha   float64   `json:"alpha" validate:"gt=0,lte=1"`
	Epsilon float64   `json:"epsilon" validate:"gte=0,lte=1"`
	Visit   VisitRule `json:"visit" validate:"oneof=first every"`
	// InitialQ is the value of pairs never updated; a high value makes the
	// greedy policy try every action (optimistic start). It is bounded like
	// rewards (MaxAbsReward), so that updates stay finite.
	InitialQ   float64 `json:"initial_q" validate:"finite,gte=-1e15,lte=1e15"`
	EpsilonMin float64 `json:"epsilon_min" validate:"gte=0,ltefield=Epsilon"`
	// EpsilonDecayVisits is k in epsilon(s) = max(epsilon_min, epsilon*k/(k+N(s)));
	// 0 turns the decay off.
	EpsilonDecayVisits float64 `json:"epsilon_decay_visits,omitempty" validate:"gte=0,finite"`
	// MaxStates is the most states the policy accepts; episodes bringing
	// more new states are refused. 0 when put: DefaultMaxStates, or the
	// policy's current value when it exists (SetStateQuota).
	MaxStates int64 `json:"max_states" validate:"gte=0"`
	// ReturnTarget is a mean return the application knows to aim for (an
	// exact optimum, or a goal); the status page draws it beside the
	// learning curve. It changes nothing in learning.
	ReturnTarget *ReturnTarget `json:"return_target,omitempty"`
	// GreedyMinVisits is how often an action must have been tried in a
	// state before it may be greedy there.
	GreedyMinVisits int64 `json:"greedy_min_visits" validate:"gte=0"`
	// GreedyUntried lets an action never tried in a state be greedy there,
	// at initial_q (an optimistic start needs it).
	GreedyUntried bool `json:"greedy_untried"`
	// GreedyFallback is the action greedy answers where no allowed action
	// is tried enough; "" for none: greedy then has no answer.
	GreedyFallback string `json:"greedy_fallback,omitempty"`
	// StateShape, when set, is the form every state must have.
	StateShape *StateShape `json:"state_shape,omitempty"`
	// RequireProbability refuses steps without a behaviour probability
	// (off-policy evaluation needs one on every step).
	RequireProbability bool `json:"require_probability"`

	// Open episodes (those qtally keeps for the application): how long one
	// may go without a decision or reward (seconds; 0: no limit) before
	// housekeeping ends or drops it as OnIdle says, how many may be open at
	// once, and how many decisions one may record.
	OpenEpisodeIdleLimit float64  `json:"open_episode_idle_limit" validate:"gte=0,finite"`
	OnIdle               IdleRule `json:"on_idle" validate:"omitempty,oneof=end drop"`
	MaxOpenEpisodes      int      `json:"max_open_episodes" validate:"gte=0,lte=100000000"`
	MaxOpenEpisodeSteps  int      `json:"max_open_episode_steps" validate:"gte=0,lte=10000"`
}

// DefaultMaxStates is a new policy's state quota unless it sets one (or its
// actions make that many states exceed the service's pairs per policy).
const DefaultMaxStates = 100_000

// SetStateQuota fills in max_states when the client left it out, keeping
// the current value of an existing policy (current > 0), and checks that
// max_states x actions stays within maxPairs.
func (s *Settings) SetStateQuota(current, maxPairs int64) error {
	if s.MaxStates == 0 && current > 0 {
		s.MaxStates = current
		return nil
	}
	actions := int64(max(len(s.Actions), 1))
	if s.MaxStates == 0 {
		s.MaxStates = max(1, min(DefaultMaxStates, maxPairs/actions))
	}
	if s.MaxStates > maxPairs/actions {
		return Invalid(-1, -1, "max_states", "%d states of %d actions would be %d pairs; this service keeps at most %d pairs per policy, so at most %d states",
			s.MaxStates, actions, s.MaxStates*actions, maxPairs, maxPairs/actions)
	}
	return nil
}

// ReturnTarget is a mean return to compare learning with, and what it is.
type ReturnTarget struct {
	Value *float64 `json:"value" validate:"required,finite,gte=-1e15,lte=1e15"`
	Label string   `json:"label" validate:"max=64,actionname"`
}

// DefaultSettings are used for every field a client leaves out.
func DefaultSettings() Settings {
	return Settings{Gamma: 1, Alpha: 0.1, Epsilon: 0.1, Visit: FirstVisit,
		OnIdle: IdleEnd, MaxOpenEpisodes: DefaultMaxOpenEpisodes, MaxOpenEpisodeSteps: DefaultMaxOpenEpisodeSteps}
}

// Policy is a named learning unit: its settings and where training stands.
type Policy struct {
	ID   int32  `json:"-"`
	Name string `json:"name"`
	Settings
	// Revision counts committed training batches (and table rewrites).
	Revision  int64     `json:"revision"`
	CreatedAt time.Time `json:"created_at"`
	UpdatedAt time.Time `json:"updated_at"`

	// TableEpoch counts restores, imports and changes of the initial value
	// or the actions, which replace the whole table or what its missing
	// pairs are worth: a copy of an older epoch must be reloaded, not patched.
	TableEpoch int64 `json:"-"`
}

// EpsilonFor is the exploration rate in a state visited n times in all.
func (s Settings) EpsilonFor(n int64) float64 {
	if s.EpsilonDecayVisits <= 0 {
		return s.Epsilon
	}
	k := s.EpsilonDecayVisits
	return math.Max(s.EpsilonMin, s.Epsilon*k/(k+float64(n)))
}

// ActionIndex maps each action name to its position.
func (s Settings) ActionIndex() map[string]int16 {
	index := make(map[string]int16, len(s.Actions))
	for i, a := range s.Actions {
		index[a] = int16(i)
	}
	return index
}

// PolicyName is a policy's name inside a request body. Every field of a
// request that names a policy has this type, so that the API can find and
// authorise each such name against the request's token when it reads the
// body, whichever route it arrived on.
type PolicyName string

// ValidatePolicyName accepts names that are safe in a URL path segment.
func ValidatePolicyName(name string) error {
	if !isPolicyName(name) {
		return Invalid(-1, -1, "policy", "policy names are 1 to %d characters of letters, digits, '.', '_' and '-', starting with a letter or digit", MaxPolicyNameLen)
	}
	return nil
}

var settingsValidator = newSettingsValidator()

func newSettingsValidator() *validator.Validate {
	v := validator.New(validator.WithRequiredStructEnabled())
	v.RegisterTagNameFunc(func(f reflect.StructField) string { return jsonName(f.Tag.Get("json")) })
	must(v.RegisterValidation("finite", func(fl validator.FieldLevel) bool {
		x := fl.Field().Float()
		return !math.IsNaN(x) && !math.IsInf(x, 0)
	}))
	must(v.RegisterValidation("actionname", func(fl validator.FieldLevel) bool {
		return printableName(fl.Field().String())
	}))
	return v
}

// isPolicyName holds for 1 to MaxPolicyNameLen ASCII letters, digits, '.',
// '_' and '-', the first a letter or digit. Every request checks its
// policy name, so this is a loop rather than a regular expression.
func isPolicyName(name string) bool {
	if len(name) == 0 || len(name) > MaxPolicyNameLen {
		return false
	}
	for i := 0; i < len(name); i++ {
		switch c := name[i]; {
		case 'a' <= c && c <= 'z', 'A' <= c && c <= 'Z', '0' <= c && c <= '9':
		case i > 0 && (c == '.' || c == '_' || c == '-'):
		default:
			return false
		}
	}
	return true
}

func must(err error) {
	if err != nil {
		panic(err)
	}
}

// printableName holds for valid UTF-8 without control characters.
func printableName(s string) bool {
	if !utf8.ValidString(s) {
		return false
	}
	for _, r := range s {
		if unicode.IsControl(r) {
			return false
		}
	}
	return true
}

var ruleMessages = map[string]string{
	"min":        "needs at least %s items",
	"max":        "must be at most %s (items or bytes)",
	"unique":     "must not repeat a name",
	"required":   "must not be empty",
	"gte":        "must be at least %s",
	"gt":         "must be greater than %s",
	"lte":        "must be at most %s",
	"oneof":      "must be one of: %s",
	"finite":     "must be a finite number",
	"actionname": "must be valid UTF-8 without control characters",
	"ltefield":   "must not exceed epsilon",
}

// Validate reports every invalid setting, each with its JSON field name.
func (s Settings) Validate() error {
	var l problemList
	if s.GreedyFallback != "" && !slices.Contains(s.Actions, s.GreedyFallback) {
		l.add(-1, -1, "greedy_fallback", "%q is not one of the policy's actions", Truncate(s.GreedyFallback, 64))
	}
	if s.StateShape != nil {
		s.StateShape.check(&l)
	}
	err := settingsValidator.Struct(s)
	if err == nil {
		return l.err()
	}
	var fieldErrs validator.ValidationErrors
	if !errors.As(err, &fieldErrs) {
		return fmt.Errorf("validate settings: %w", err)
	}
	for _, fe := range fieldErrs {
		msg, ok := ruleMessages[fe.Tag()]
		if !ok {
			msg = "is invalid (" + fe.Tag() + ")"
		}
		if fe.Param() != "" && containsVerb(msg) {
			msg = fmt.Sprintf(msg, fe.Param())
		}
		l.add(-1, -1, fieldPath(fe.Namespace()), "%s", msg)
	}
	return l.err()
}
