package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"
)

// The deployment files (deploy/) run the binary with commands, flags and
// environment variables. These helpers read what the binary really accepts
// from its own help, so that the files are checked against the binary
// rather than against a list kept by hand.

// cliFlag is one flag as `qtally <command> --help` lists it.
type cliFlag struct {
	name       string
	takesValue bool
	env        string
	def        string
}

// cliCommand is one subcommand's flags, by name and by environment variable.
type cliCommand struct {
	name  string
	flags map[string]cliFlag
	env   map[string]cliFlag
}

var (
	// "   --listen string   HTTP listen address (default: ":8080") [$QTALLY_LISTEN]"
	helpFlagLine = regexp.MustCompile(`^\s+--([a-z0-9-]+)(?:, -[a-zA-Z0-9]+)?(?: ([a-z0-9]+))?\s{2,}(.*)$`)
	helpEnv      = regexp.MustCompile(`\[\$([A-Z0-9_]+)\]\s*$`)
	helpDefault  = regexp.MustCompile(`\(default: (.*?)\)(?: \[\$[A-Z0-9_]+\])?\s*$`)
	// "   serve    run the HTTP API ..."
	helpCommandLine = regexp.MustCompile(`^\s{2,}([a-z][a-z0-9-]*)(?:, [a-z]+)?\s{2,}\S`)
)

// qtallyHelp runs `qtally args... --help` as the binary would and returns
// what it printed.
func qtallyHelp(t testing.TB, args ...string) (string, error) {
	t.Helper()
	var out, errOut bytes.Buffer
	err := run(context.Background(), append(append([]string{"qtally"}, args...), "--help"),
		func(string) string { return "" }, &out, &errOut)
	if err != nil {
		return out.String(), fmt.Errorf("%w: %s", err, errOut.String())
	}
	return out.String(), nil
}

// qtallyCommands lists the binary's subcommands from its help.
func qtallyCommands(t testing.TB) map[string]cliCommand {
	t.Helper()
	root, err := qtallyHelp(t)
	if err != nil {
		t.Fatalf("qtally --help: %v", err)
	}
	_, section, ok := strings.Cut(root, "COMMANDS:\n")
	if !ok {
		t.Fatalf("qtally --help lists no commands:\n%s", root)
	}
	section, _, _ = strings.Cut(section, "\n\n")
	commands := map[string]cliCommand{}
	for _, line := range strings.Split(section, "\n") {
		m := helpCommandLine.FindStringSubmatch(line)
		if m == nil || m[1] == "help" {
			continue
		}
		commands[m[1]] = readCommandHelp(t, m[1])
	}
	for _, want := range []string{"serve", "worker", "migrate", "healthcheck"} {
		if _, ok := commands[want]; !ok {
			t.Fatalf("qtally --help does not list %q; parsed %v from:\n%s", want, slices.Sorted(mapKeys(commands)), root)
		}
	}
	return commands
}

func readCommandHelp(t testing.TB, name string) cliCommand {
	t.Helper()
	text, err := qtallyHelp(t, name)
	if err != nil {
		t.Fatalf("qtally %s --help: %v", name, err)
	}
	c := cliCommand{name: name, flags: map[string]cliFlag{}, env: map[string]cliFlag{}}
	for _, line := range strings.Split(text, "\n") {
		m := helpFlagLine.FindStringSubmatch(line)
		if m == nil || m[1] == "help" {
			continue
		}
		f := cliFlag{name: m[1], takesValue: m[2] != ""}
		if e := helpEnv.FindStringSubmatch(m[3]); e != nil {
			f.env = e[1]
		}
		if d := helpDefault.FindStringSubmatch(m[3]); d != nil {
			f.def = strings.Trim(d[1], `"`)
		}
		c.flags[f.name] = f
		if f.env != "" {
			c.env[f.env] = f
		}
	}
	// A command made only of subcommands (load) has no flags of its own.
	if len(c.flags) == 0 && !strings.Contains(text, "COMMANDS:") {
		t.Fatalf("qtally %s --help lists no flags:\n%s", name, text)
	}
	return c
}

func mapKeys[K comparable, V any](m map[K]V) func(func(K) bool) {
	return func(yield func(K) bool) {
		for k := range m {
			if !yield(k) {
				return
			}
		}
	}
}

// invocation is a parsed command line of the binary.
type invocation struct {
	command cliCommand
	// set holds the flags given on the command line (bool flags: "true").
	set map[string]string
}

// parseInvocation checks args (subcommand first, then flags) against the
// binary's help, then lets the binary parse them itself: a value it cannot
// parse (a bad duration, say) fails there.
func parseInvocation(t testing.TB, commands map[string]cliCommand, where string, args []string) (invocation, bool) {
	t.Helper()
	if len(args) == 0 {
		t.Errorf("%s: no command given to qtally", where)
		return invocation{}, false
	}
	cmd, ok := commands[args[0]]
	if !ok {
		t.Errorf("%s: %q is not a qtally command (it has %v)", where, args[0], slices.Sorted(mapKeys(commands)))
		return invocation{}, false
	}
	inv := invocation{command: cmd, set: map[string]string{}}
	for i := 1; i < len(args); i++ {
		arg := args[i]
		name, value, hasValue := strings.Cut(strings.TrimPrefix(arg, "--"), "=")
		if !strings.HasPrefix(arg, "--") {
			t.Errorf("%s: qtally %s takes no argument %q (flags are --name value)", where, cmd.name, arg)
			return inv, false
		}
		f, ok := cmd.flags[name]
		if !ok {
			t.Errorf("%s: qtally %s has no flag --%s", where, cmd.name, name)
			return inv, false
		}
		switch {
		case hasValue:
		case f.takesValue && i+1 < len(args):
			i++
			value = args[i]
		case f.takesValue:
			t.Errorf("%s: --%s of qtally %s needs a value", where, name, cmd.name)
			return inv, false
		default:
			value = "true"
		}
		inv.set[name] = value
	}
	if _, err := qtallyHelp(t, args...); err != nil {
		t.Errorf("%s: qtally refuses %q: %v", where, args, err)
		return inv, false
	}
	return inv, true
}

// checkEnvRead reports variables set for a command that it does not read.
func checkEnvRead(t testing.TB, where string, cmd cliCommand, names []string) {
	t.Helper()
	for _, name := range names {
		if _, ok := cmd.env[name]; ok {
			continue
		}
		t.Errorf("%s: sets %s, which qtally %s does not read (it reads %v)", where, name, cmd.name, slices.Sorted(mapKeys(cmd.env)))
	}
}

// setting is a flag's effective value: the command line first, then the
// environment, then the default.
func (inv invocation) setting(t testing.TB, flag string, env map[string]string) string {
	t.Helper()
	f, ok := inv.command.flags[flag]
	if !ok {
		t.Fatalf("qtally %s has no flag --%s", inv.command.name, flag)
	}
	if v, ok := inv.set[flag]; ok {
		return v
	}
	if v, ok := env[f.env]; ok && f.env != "" {
		return v
	}
	return f.def
}

// listenPort is the port a serve or worker process listens on.
func (inv invocation) listenPort(t testing.TB, env map[string]string) string {
	t.Helper()
	listen := inv.setting(t, "listen", env)
	_, port, err := net.SplitHostPort(listen)
	if err != nil {
		t.Fatalf("qtally %s listens on %q: %v", inv.command.name, listen, err)
	}
	return port
}

// dockerfile is deploy/Dockerfile, instruction by instruction.
type dockerfile struct {
	// args are the names of every ARG, in every stage.
	args []string
	// stages hold their instructions; the last is the image.
	stages []dockerStage
}

type dockerStage struct {
	from         string
	instructions []dockerInstruction
}

type dockerInstruction struct {
	keyword string
	rest    string
}

func readDockerfile(t testing.TB) dockerfile {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("deploy", "Dockerfile"))
	if err != nil {
		t.Fatal(err)
	}
	var df dockerfile
	var logical string
	for _, line := range strings.Split(string(data), "\n") {
		trimmed := strings.TrimSpace(line)
		if strings.HasPrefix(trimmed, "#") || (trimmed == "" && logical == "") {
			continue
		}
		if strings.HasSuffix(trimmed, `\`) {
			logical += strings.TrimSuffix(trimmed, `\`) + " "
			continue
		}
		logical += trimmed
		keyword, rest, _ := strings.Cut(logical, " ")
		logical = ""
		ins := dockerInstruction{keyword: strings.ToUpper(keyword), rest: strings.TrimSpace(rest)}
		switch ins.keyword {
		case "ARG":
			name, _, _ := strings.Cut(ins.rest, "=")
			df.args = append(df.args, name)
		case "FROM":
			df.stages = append(df.stages, dockerStage{from: ins.rest})
			continue
		}
		if len(df.stages) > 0 {
			st := &df.stages[len(df.stages)-1]
			st.instructions = append(st.instructions, ins)
		}
	}
	if len(df.stages) < 2 {
		t.Fatalf("deploy/Dockerfile has %d stages, want a build stage and the image", len(df.stages))
	}
	return df
}

// all returns the stage's instructions with a keyword.
func (s dockerStage) all(keyword string) []string {
	var out []string
	for _, ins := range s.instructions {
		if ins.keyword == keyword {
			out = append(out, ins.rest)
		}
	}
	return out
}

// one returns the stage's single instruction with a keyword.
func (s dockerStage) one(t testing.TB, keyword string) string {
	t.Helper()
	all := s.all(keyword)
	if len(all) != 1 {
		t.Fatalf("stage FROM %s has %d %s instructions, want 1", s.from, len(all), keyword)
	}
	return all[0]
}

// execForm decodes the JSON array form of CMD, ENTRYPOINT and HEALTHCHECK.
func execForm(t testing.TB, what, s string) []string {
	t.Helper()
	var out []string
	if err := json.Unmarshal([]byte(s), &out); err != nil {
		t.Fatalf("%s %s is not in exec form (a JSON array): %v", what, s, err)
	}
	return out
}

// envAssignments parses ENV a=b c=d.
func envAssignments(t testing.TB, s string) map[string]string {
	t.Helper()
	out := map[string]string{}
	for _, field := range strings.Fields(s) {
		k, v, ok := strings.Cut(field, "=")
		if !ok {
			t.Fatalf("ENV %s: write it as NAME=value", s)
		}
		out[k] = v
	}
	return out
}
