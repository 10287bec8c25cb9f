package config

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func TestLogger(t *testing.T) {
	cases := []struct {
		format   string
		terminal bool
		json     bool
		colour   bool
	}{
		{"json", true, true, false},
		{"json", false, true, false},
		{"console", false, false, false},
		{"console", true, false, true},
		{"auto", true, false, true},
		{"auto", false, true, false},
	}
	for _, tc := range cases {
		var buf bytes.Buffer
		c := Default()
		c.Log.Format = tc.format
		lg := c.Logger(&buf, tc.terminal)
		lg.Info().Str("learner", "l-17").Msg("applied")
		out := buf.String()
		var m map[string]any
		isJSON := json.Unmarshal([]byte(out), &m) == nil
		if isJSON != tc.json {
			t.Errorf("format %s, terminal %v: JSON = %v, want %v: %q", tc.format, tc.terminal, isJSON, tc.json, out)
		}
		if isJSON && (m["level"] != "info" || m["message"] != "applied" || m["learner"] != "l-17" || m["time"] == nil) {
			t.Errorf("format %s: JSON entry %v", tc.format, m)
		}
		if colour := strings.Contains(out, "\x1b["); colour != tc.colour {
			t.Errorf("format %s, terminal %v: colour = %v, want %v: %q", tc.format, tc.terminal, colour, tc.colour, out)
		}
		if !strings.Contains(out, "l-17") {
			t.Errorf("format %s: field lost: %q", tc.format, out)
		}
	}
}

func TestLoggerLevel(t *testing.T) {
	var buf bytes.Buffer
	c := Default()
	c.Log = Log{Level: "warn", Format: "json"}
	lg := c.Logger(&buf, false)
	lg.Info().Msg("dropped")
	lg.Warn().Msg("kept")
	if out := buf.String(); strings.Contains(out, "dropped") || !strings.Contains(out, "kept") {
		t.Errorf("level warn: %q", out)
	}
	buf.Reset()
	c.Log.Level = "nonsense" // Validate refuses it; Logger falls back to info
	lg = c.Logger(&buf, false)
	lg.Debug().Msg("dropped")
	lg.Info().Msg("kept")
	if out := buf.String(); strings.Contains(out, "dropped") || !strings.Contains(out, "kept") {
		t.Errorf("fallback level: %q", out)
	}
}

func TestIsTerminal(t *testing.T) {
	if IsTerminal(&bytes.Buffer{}) {
		t.Error("a buffer is not a terminal")
	}
	f, err := os.Create(filepath.Join(t.TempDir(), "log"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if IsTerminal(f) {
		t.Error("a regular file is not a terminal")
	}
	null, err := os.OpenFile(os.DevNull, os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer null.Close()
	// /dev/null is a character device but not a terminal: the reason to use
	// isatty rather than os.ModeCharDevice.
	if IsTerminal(null) {
		t.Error("/dev/null is not a terminal")
	}
}
