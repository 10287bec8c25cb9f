package config

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// FuzzLoad feeds arbitrary bytes to Load as the config file. Load and
// Validate must never panic, every error must be a *KeyError (key, problem,
// fix), and yaml's strict decoder must never find a problem that the walk
// over the document missed (the backstop error), except with merge keys.
func FuzzLoad(f *testing.F) {
	seeds, _ := filepath.Glob(filepath.Join(fixtures, "*.yml"))
	seeds = append(seeds, "../deploy/attain.yaml")
	for _, s := range seeds {
		data, err := os.ReadFile(s)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	f.Add([]byte("a: &a [*a]\n"))
	f.Add([]byte("<<: {data_dir: x}\n"))
	f.Add([]byte("batch: {interval: !!binary AAAA}\n"))
	f.Add([]byte("batch:\n  interval: &every\nconsumer: &g \n&00000:\n00000000: 00")) // found by fuzzing: an empty key
	dir := f.TempDir()
	path := filepath.Join(dir, "fuzz.yml")
	f.Fuzz(func(t *testing.T, data []byte) {
		if err := os.WriteFile(path, data, 0o600); err != nil {
			t.Fatal(err)
		}
		c, err := Load(path, nil, nil)
		if err != nil {
			for _, ke := range keyErrors(t, err) {
				if ke.Key == "" || ke.Problem == "" || ke.Fix == "" {
					t.Fatalf("incomplete problem %#v", ke)
				}
				if ke.Key == path && strings.HasPrefix(ke.Problem, "yaml: unmarshal errors") && !bytes.Contains(data, []byte("<<")) {
					t.Fatalf("strict decoder found what the walk missed: %v\ninput %q", ke, data)
				}
			}
			return
		}
		_ = c.Validate()
		_ = c.Policy()
	})
}
