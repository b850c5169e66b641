package export

import (
	"bytes"
	_ "embed"
	"errors"
	"fmt"
	"sort"
	"strings"

	"github.com/santhosh-tekuri/jsonschema/v6"
	"github.com/santhosh-tekuri/jsonschema/v6/kind"
	"golang.org/x/text/language"
	"golang.org/x/text/message"
)

// schemaFile is the JSON Schema of reconstruction.json. The canonical copy
// in the repository's schema folder is kept byte-identical (a test checks).
//
//go:embed schema/reconstruction.schema.json
var schemaFile []byte

// schemaURL is the schema's $id; the schema is loaded from memory under it.
const schemaURL = "urn:trackfactor:schema:reconstruction@1"

// SchemaJSON returns a copy of the embedded JSON Schema (draft 2020-12) of
// reconstruction.json.
func SchemaJSON() []byte { return bytes.Clone(schemaFile) }

// Validator checks documents against the embedded schema. Build one with
// NewValidator when validating many files; Validate builds one per call.
type Validator struct {
	sch *jsonschema.Schema
}

// NewValidator compiles the embedded schema.
func NewValidator() (*Validator, error) {
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(schemaFile))
	if err != nil {
		return nil, fmt.Errorf("export: embedded schema is not JSON: %v; the build is broken, please report this", err)
	}
	c := jsonschema.NewCompiler()
	c.DefaultDraft(jsonschema.Draft2020)
	if err := c.AddResource(schemaURL, doc); err != nil {
		return nil, fmt.Errorf("export: loading embedded schema: %v; the build is broken, please report this", err)
	}
	sch, err := c.Compile(schemaURL)
	if err != nil {
		return nil, fmt.Errorf("export: compiling embedded schema: %v; the build is broken, please report this", err)
	}
	return &Validator{sch: sch}, nil
}

// Validate checks data (the bytes of a reconstruction.json) against the
// embedded schema. The error is one line naming the JSON pointer of the
// offending value, the schema rule it broke and how many other problems
// there are.
func Validate(data []byte) error {
	v, err := NewValidator()
	if err != nil {
		return err
	}
	return v.Validate(data)
}

// Validate checks data against the schema; see the package-level Validate.
func (v *Validator) Validate(data []byte) error {
	inst, err := jsonschema.UnmarshalJSON(bytes.NewReader(data))
	if err != nil {
		return fmt.Errorf("export: reconstruction JSON cannot be parsed (%v); the file is damaged or not JSON", err)
	}
	err = v.sch.Validate(inst)
	if err == nil {
		return nil
	}
	var ve *jsonschema.ValidationError
	if !errors.As(err, &ve) {
		return fmt.Errorf("export: validating reconstruction JSON: %v", err)
	}
	probs := leafProblems(ve)
	if len(probs) == 0 {
		return fmt.Errorf("export: reconstruction JSON does not match schema %s: %s", SchemaID, ve.Error())
	}
	first := probs[0]
	more := ""
	if n := len(probs) - 1; n == 1 {
		more = " (and 1 more problem)"
	} else if n > 1 {
		more = fmt.Sprintf(" (and %d more problems)", n)
	}
	return fmt.Errorf("export: reconstruction JSON does not match schema %s at %s: rule %q: %s%s; write it with a matching trackfactor or fix that field",
		SchemaID, pointerText(first.ptr), first.rule, first.msg, more)
}

type problem struct {
	ptr, rule, msg string
}

// leafProblems flattens the error tree into its leaves, sorted by pointer
// then message so the reported first problem does not depend on the order
// the validator happened to visit keywords in.
func leafProblems(ve *jsonschema.ValidationError) []problem {
	printer := message.NewPrinter(language.English)
	var out []problem
	var walk func(e *jsonschema.ValidationError)
	walk = func(e *jsonschema.ValidationError) {
		if len(e.Causes) > 0 {
			for _, c := range e.Causes {
				walk(c)
			}
			return
		}
		ptr := ""
		for _, tok := range e.InstanceLocation {
			ptr += "/" + escapePointer(tok)
		}
		rule := strings.Join(e.ErrorKind.KeywordPath(), "/")
		if req, ok := e.ErrorKind.(*kind.Required); ok && len(req.Missing) > 0 {
			// Name the missing member itself, not its parent object.
			ptr += "/" + escapePointer(req.Missing[0])
		}
		if ap, ok := e.ErrorKind.(*kind.AdditionalProperties); ok {
			// The validator lists the extra members in map order; sort
			// them so the same file always gives the same message.
			sort.Strings(ap.Properties)
		}
		msg := strings.ReplaceAll(e.ErrorKind.LocalizedString(printer), "\n", " ")
		msg = strings.TrimPrefix(msg, rule+": ") // some messages repeat the keyword
		out = append(out, problem{ptr: ptr, rule: rule, msg: msg})
	}
	walk(ve)
	sort.Slice(out, func(i, j int) bool {
		if out[i].ptr != out[j].ptr {
			return out[i].ptr < out[j].ptr
		}
		return out[i].msg < out[j].msg
	})
	return out
}
