package main

import (
	"bytes"
	"fmt"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strconv"
	"strings"

	"github.com/pelletier/go-toml/v2"
	"github.com/urfave/cli/v2"
	"gopkg.in/yaml.v3"

	"trackfactor/pipeline"
)

// Configuration. Every flag of every command can also be given
//
//   - in the environment, as TRACKFACTOR_ and the flag's name in capitals
//     with - as _ (TRACKFACTOR_CORNERS=500, TRACKFACTOR_FB_THRESHOLD=0.8);
//   - in a config file named by --config FILE (or TRACKFACTOR_CONFIG),
//     YAML (.yaml, .yml) or TOML (.toml), whose keys are flag names (- or
//     _ alike); a key that names a command holds settings for that command
//     alone, which win over the top-level ones.
//
// Precedence: the command line, then the environment, then the file, then
// the flag's default. It works on the flags as the commands define them,
// so a flag added later is covered without any change here. The file's
// path and which flags came from the file or the environment are recorded
// in the reconstruction's settings ("config").

const envPrefix = "TRACKFACTOR_"

// envName is the environment variable of a flag.
func envName(flag string) string {
	return envPrefix + strings.ToUpper(strings.ReplaceAll(flag, "-", "_"))
}

// configInfo records where settings came from; it goes into the JSON.
type configInfo struct {
	File     string   `json:"file,omitempty"`
	FromFile []string `json:"from_file,omitempty"`
	FromEnv  []string `json:"from_env,omitempty"`
}

// asSettings is the value of the "config" entry of the JSON settings.
func (ci configInfo) asSettings() map[string]any {
	m := map[string]any{"file": ci.File, "from_file": nonNil(ci.FromFile), "from_env": nonNil(ci.FromEnv)}
	return m
}

func nonNil(s []string) []string {
	if s == nil {
		return []string{}
	}
	return s
}

const metaConfig = "config"

// configOf returns what the config step recorded for this run.
func configOf(c *cli.Context) configInfo {
	if ci, ok := c.App.Metadata[metaConfig].(configInfo); ok {
		return ci
	}
	return configInfo{}
}

const configHelp = "Every flag can also come from the environment (TRACKFACTOR_ + the flag name in\n" +
	"capitals, - as _, e.g. TRACKFACTOR_CORNERS=500) or from a --config file (YAML or\n" +
	"TOML, keys = flag names). The command line wins, then the environment, then\n" +
	"the file, then the default."

// setupConfig gives every command a --config flag and a Before step that
// fills in, for each flag not given on the command line, the value from
// the environment or the config file.
func setupConfig(app *cli.App) {
	known := map[string]bool{}
	commands := map[string]bool{}
	var walk func(cmds []*cli.Command)
	walk = func(cmds []*cli.Command) {
		for _, cmd := range cmds {
			commands[cmd.Name] = true
			for _, f := range cmd.Flags {
				for _, n := range f.Names() {
					known[normKey(n)] = true
				}
			}
			walk(cmd.Subcommands)
		}
	}
	walk(app.Commands)
	var add func(cmds []*cli.Command)
	add = func(cmds []*cli.Command) {
		for _, cmd := range cmds {
			cmd.Flags = append(cmd.Flags, &cli.StringFlag{Name: "config", Usage: "read flag values from this YAML or TOML file (keys = flag names; TRACKFACTOR_CONFIG works too)"})
			if cmd.Description != "" {
				cmd.Description += "\n\n" + configHelp
			} else {
				cmd.Description = configHelp
			}
			before := cmd.Before
			cmd.Before = func(c *cli.Context) error {
				if err := applyConfig(c, known, commands); err != nil {
					return err
				}
				if before != nil {
					return before(c)
				}
				return nil
			}
			add(cmd.Subcommands)
		}
	}
	add(app.Commands)
}

// normKey makes - and _ equivalent in keys and flag names.
func normKey(k string) string { return strings.ReplaceAll(strings.ToLower(k), "_", "-") }

// applyConfig applies environment and file values to the flags of the
// command being run that the command line did not set.
func applyConfig(c *cli.Context, known, commands map[string]bool) error {
	var info configInfo
	path := c.String("config")
	if !c.IsSet("config") {
		path = os.Getenv(envName("config"))
	}
	var values map[string]any
	if path != "" {
		info.File = path
		all, err := loadConfig(path)
		if err != nil {
			return err
		}
		if values, err = configFor(all, c.Command, known, commands, path); err != nil {
			return err
		}
	}
	for _, f := range c.Command.Flags {
		names := f.Names()
		name := names[0]
		if name == "config" || name == "help" || c.IsSet(name) {
			continue
		}
		if ev, ok := os.LookupEnv(envName(name)); ok {
			if err := setFlag(c, f, ev); err != nil {
				return usagef("%s=%q: %v; fix or unset the variable", envName(name), ev, err)
			}
			info.FromEnv = append(info.FromEnv, name)
			continue
		}
		v, ok := values[normKey(name)]
		if !ok {
			for _, a := range names[1:] {
				if v, ok = values[normKey(a)]; ok {
					break
				}
			}
		}
		if !ok {
			continue
		}
		if err := applyValue(c, f, v); err != nil {
			return usagef("config %s: %s: %v; fix the value or remove the key", path, name, err)
		}
		info.FromFile = append(info.FromFile, name)
	}
	sort.Strings(info.FromEnv)
	sort.Strings(info.FromFile)
	if c.App.Metadata == nil {
		c.App.Metadata = map[string]any{}
	}
	c.App.Metadata[metaConfig] = info
	if f := lookupFlag(c.Command, "log-format"); f != nil {
		if lf := c.String("log-format"); lf != logText && lf != logJSON {
			return usagef("--log-format %q is not known; use %s or %s", lf, logText, logJSON)
		}
	}
	return nil
}

func lookupFlag(cmd *cli.Command, name string) cli.Flag {
	for _, f := range cmd.Flags {
		for _, n := range f.Names() {
			if n == name {
				return f
			}
		}
	}
	return nil
}

// loadConfig reads a YAML or TOML file into a map, by extension (.toml is
// TOML, .yaml and .yml YAML; another extension is tried as YAML, then as
// TOML).
func loadConfig(path string) (map[string]any, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, &pipeline.InputError{Err: fmt.Errorf("config: %w; give the path of a YAML or TOML file", err)}
	}
	var m map[string]any
	ext := strings.ToLower(filepath.Ext(path))
	decodeYAML := func() error {
		dec := yaml.NewDecoder(bytes.NewReader(data))
		err := dec.Decode(&m)
		if err != nil && err.Error() == "EOF" {
			m, err = map[string]any{}, nil // an empty file
		}
		return err
	}
	decodeTOML := func() error { return toml.Unmarshal(data, &m) }
	switch ext {
	case ".toml":
		err = decodeTOML()
	case ".yaml", ".yml":
		err = decodeYAML()
	default:
		if err = decodeYAML(); err != nil {
			m = nil
			if terr := decodeTOML(); terr == nil {
				err = nil
			}
		}
	}
	if err != nil {
		return nil, &pipeline.InputError{Err: fmt.Errorf("config %s cannot be read: %v; write it as YAML (key: value) or TOML (key = value) with flag names as keys", path, oneLine(err.Error()))}
	}
	if m == nil {
		m = map[string]any{}
	}
	return m, nil
}

// configFor picks the values for cmd: the top-level keys, overridden by
// those of the section named after the command. Keys that name no flag of
// any command (or, in a section, no flag of that command) are refused, so
// that a typo does not silently do nothing.
func configFor(all map[string]any, cmd *cli.Command, known, commands map[string]bool, path string) (map[string]any, error) {
	out := map[string]any{}
	var sections []string
	// Visit keys in sorted order so the same file always gives the same
	// message (map order is random).
	keys := make([]string, 0, len(all))
	for k := range all {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		v := all[k]
		nk := normKey(k)
		if commands[k] {
			if _, ok := v.(map[string]any); !ok {
				return nil, usagef("config %s: %q names a command; give its settings as a table (%s: {corners: 500})", path, k, k)
			}
			sections = append(sections, k)
			continue
		}
		if nk == "config" {
			return nil, usagef("config %s: a config file cannot name another config file; remove the key %q", path, k)
		}
		if !known[nk] {
			return nil, usagef("config %s: %q is not a flag of any command; use flag names as keys (see trackfactor COMMAND --help)", path, k)
		}
		out[nk] = v
	}
	for _, s := range sections {
		if s != cmd.Name {
			continue
		}
		sub := all[s].(map[string]any)
		subKeys := make([]string, 0, len(sub))
		for k := range sub {
			subKeys = append(subKeys, k)
		}
		sort.Strings(subKeys)
		for _, k := range subKeys {
			v := sub[k]
			nk := normKey(k)
			if lookupNorm(cmd, nk) == nil || nk == "config" {
				return nil, usagef("config %s: %s.%s is not a flag of %s; see trackfactor %s --help", path, s, k, s, s)
			}
			out[nk] = v
		}
	}
	return out, nil
}

func lookupNorm(cmd *cli.Command, nk string) cli.Flag {
	for _, f := range cmd.Flags {
		for _, n := range f.Names() {
			if normKey(n) == nk {
				return f
			}
		}
	}
	return nil
}

// applyValue sets a flag from a decoded config value: scalars as their
// text, lists element by element (for list flags).
func applyValue(c *cli.Context, f cli.Flag, v any) error {
	if list, ok := v.([]any); ok {
		if !isSliceFlag(f) {
			return fmt.Errorf("a list is given but the flag takes one value")
		}
		for _, e := range list {
			s, err := scalarText(e)
			if err != nil {
				return err
			}
			if err := setFlag(c, f, s); err != nil {
				return err
			}
		}
		return nil
	}
	s, err := scalarText(v)
	if err != nil {
		return err
	}
	return setFlag(c, f, s)
}

func setFlag(c *cli.Context, f cli.Flag, s string) error {
	if err := c.Set(f.Names()[0], s); err != nil {
		return fmt.Errorf("invalid value %q (%v)", s, err)
	}
	return nil
}

func isSliceFlag(f cli.Flag) bool {
	switch f.(type) {
	case *cli.StringSliceFlag, *cli.IntSliceFlag, *cli.Int64SliceFlag, *cli.Float64SliceFlag, *cli.UintSliceFlag, *cli.Uint64SliceFlag:
		return true
	}
	return false
}

func scalarText(v any) (string, error) {
	switch x := v.(type) {
	case string:
		return x, nil
	case bool:
		return strconv.FormatBool(x), nil
	case int:
		return strconv.Itoa(x), nil
	case int64:
		return strconv.FormatInt(x, 10), nil
	case uint64:
		return strconv.FormatUint(x, 10), nil
	case float64:
		return strconv.FormatFloat(x, 'g', -1, 64), nil
	case nil:
		return "", fmt.Errorf("no value given")
	}
	if rv := reflect.ValueOf(v); rv.Kind() == reflect.Map {
		return "", fmt.Errorf("a table is given but the flag takes a value")
	}
	return fmt.Sprint(v), nil
}
