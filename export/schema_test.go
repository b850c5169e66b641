package export

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// The repository keeps the canonical schema in schema/ at the module root;
// the package embeds a copy. They must not drift apart.
func TestSchemaCopiesIdentical(t *testing.T) {
	canonical, err := os.ReadFile(filepath.Join("..", "schema", "reconstruction.schema.json"))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(canonical, SchemaJSON()) {
		t.Fatal("schema/reconstruction.schema.json and export/schema/reconstruction.schema.json differ; copy one over the other")
	}
}

// The schema declares draft 2020-12 by its meta-schema URI (JSON Schema
// Core, draft 2020-12, section 8.1.1) and compiles, which includes
// validation against that meta-schema.
func TestSchemaIsDraft202012(t *testing.T) {
	var s map[string]any
	if err := json.Unmarshal(SchemaJSON(), &s); err != nil {
		t.Fatal(err)
	}
	if got := s["$schema"]; got != "https://json-schema.org/draft/2020-12/schema" {
		t.Errorf("$schema = %v", got)
	}
	if _, err := NewValidator(); err != nil {
		t.Fatal(err)
	}
}

// The example of DESIGN.md ("Output contract (v1)") with its placeholders
// filled in (one model instead of the list of alternatives, real frame
// names) must be valid: the schema accepts what the contract shows.
func TestSchemaAcceptsContractExample(t *testing.T) {
	example := `{
  "schema": "trackfactor/reconstruction@1",
  "producer": {"version": "0.1.0", "command": "trackfactor run frames out"},
  "input": {"source": "frames", "frames": ["000.png", "001.png"], "width": 640, "height": 480},
  "settings": {"model": "orthographic", "max_corners": 0},
  "model": "orthographic",
  "units": "px",
  "cameras": [{"frame": 0, "image": "000.png", "rotation": [[1,0,0],[0,1,0],[0,0,1]],
               "translation": [0,0,0], "scale": 1.0, "rms_px": 0.2}],
  "points": [{"track": 17, "xyz": [0.1, 2.0, -3.5], "rgb": [128, 120, 99],
              "views": 12, "rms_px": 0.21}],
  "diagnostics": {"singular_values": [], "rms_px": 0.0, "expected_rms_px": 0.0,
                  "mirror_ambiguous": true, "warnings": [{"code": "planar-scene", "message": "flat"}]}
}`
	if err := Validate([]byte(example)); err != nil {
		t.Fatal(err)
	}
}

func TestWrittenDocumentValidates(t *testing.T) {
	if err := Validate(writeJSON(t, goldenDocument())); err != nil {
		t.Fatal(err)
	}
}

// Broken documents must fail with one line naming the JSON pointer (RFC
// 6901) of the offending value and the rule it broke.
func TestValidateRejectsBrokenDocuments(t *testing.T) {
	cases := []struct {
		name    string
		mutate  func(m map[string]any)
		pointer string
		rule    string
	}{
		{"missing width", func(m map[string]any) { delete(obj(m, "input"), "width") }, "/input/width", "required"},
		{"missing diagnostics", func(m map[string]any) { delete(m, "diagnostics") }, "/diagnostics", "required"},
		{"width is a string", func(m map[string]any) { obj(m, "input")["width"] = "640" }, "/input/width", "type"},
		{"views is fractional", func(m map[string]any) { item(m, "points", 0)["views"] = 2.5 }, "/points/0/views", "type"},
		{"wrong schema string", func(m map[string]any) { m["schema"] = "trackfactor/reconstruction@2" }, "/schema", "const"},
		{"rotation has 2 rows", func(m map[string]any) {
			c := item(m, "cameras", 0)
			c["rotation"] = c["rotation"].([]any)[:2]
		}, "/cameras/0/rotation", "minItems"},
		{"rotation row has 4 entries", func(m map[string]any) {
			c := item(m, "cameras", 1)
			rows := c["rotation"].([]any)
			rows[2] = append(rows[2].([]any), 0.0)
		}, "/cameras/1/rotation/2", "maxItems"},
		{"rotation entry is text", func(m map[string]any) {
			item(m, "cameras", 0)["rotation"].([]any)[1].([]any)[1] = "one"
		}, "/cameras/0/rotation/1/1", "type"},
		{"rgb above 255", func(m map[string]any) { item(m, "points", 1)["rgb"].([]any)[2] = 256.0 }, "/points/1/rgb/2", "maximum"},
		{"unknown model", func(m map[string]any) { m["model"] = "weak-perspective" }, "/model", "enum"},
		{"unknown camera field", func(m map[string]any) { item(m, "cameras", 0)["focal"] = 1.0 }, "/cameras/0", "additionalProperties"},
		{"negative rms", func(m map[string]any) { obj(m, "diagnostics")["rms_px"] = -1.0 }, "/diagnostics/rms_px", "minimum"},
		{"bad warning code", func(m map[string]any) {
			obj(m, "diagnostics")["warnings"].([]any)[0].(map[string]any)["code"] = "Planar Scene"
		}, "/diagnostics/warnings/0/code", "pattern"},
		{"settings not an object", func(m map[string]any) { m["settings"] = []any{} }, "/settings", "type"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var m map[string]any
			if err := json.Unmarshal(writeJSON(t, goldenDocument()), &m); err != nil {
				t.Fatal(err)
			}
			c.mutate(m)
			data, err := json.Marshal(m)
			if err != nil {
				t.Fatal(err)
			}
			err = Validate(data)
			if err == nil {
				t.Fatal("broken document accepted")
			}
			msg := err.Error()
			if !strings.Contains(msg, " at "+c.pointer+": ") || !strings.Contains(msg, `rule "`+c.rule+`"`) {
				t.Errorf("error %q: want pointer %s and rule %q", msg, c.pointer, c.rule)
			}
			if strings.Contains(msg, "\n") || !strings.HasPrefix(msg, "export: ") {
				t.Errorf("error is not one package-prefixed line: %q", msg)
			}
		})
	}
}

func TestValidateCountsOtherProblems(t *testing.T) {
	var m map[string]any
	if err := json.Unmarshal(writeJSON(t, goldenDocument()), &m); err != nil {
		t.Fatal(err)
	}
	delete(obj(m, "input"), "width")
	m["units"] = ""
	m["model"] = "pinhole"
	data, _ := json.Marshal(m)
	err := Validate(data)
	if err == nil || !strings.Contains(err.Error(), "(and 2 more problems)") {
		t.Errorf("error %v should report 3 problems", err)
	}
}

func obj(m map[string]any, key string) map[string]any { return m[key].(map[string]any) }

func item(m map[string]any, key string, i int) map[string]any {
	return m[key].([]any)[i].(map[string]any)
}
