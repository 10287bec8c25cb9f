package config

import (
	"go/parser"
	"go/token"
	"reflect"
	"slices"
	"strings"
	"testing"
)

// TestKeyTable checks that the key table, the meanings and the struct agree.
func TestKeyTable(t *testing.T) {
	if len(allKeys) != len(meanings) {
		var paths []string
		for _, k := range allKeys {
			paths = append(paths, k.path)
		}
		for m := range meanings {
			if !slices.Contains(paths, m) {
				t.Errorf("meanings has %q, which is not a key", m)
			}
		}
	}
	for path, flag := range flagNames {
		if k := byPath[path]; k == nil || k.flag != flag {
			t.Errorf("flag %s: key %s missing", flag, path)
		}
	}
	// Keys are leaves: every leaf field of Config, by walking the struct
	// independently of buildKeys.
	n := 0
	var count func(reflect.Type)
	count = func(t reflect.Type) {
		for i := range t.NumField() {
			if ft := t.Field(i).Type; ft.Kind() == reflect.Struct {
				count(ft)
			} else {
				n++
			}
		}
	}
	count(reflect.TypeFor[Config]())
	if n != len(allKeys) {
		t.Errorf("Config has %d leaf fields, the key table %d", n, len(allKeys))
	}
	// The examples of the contract.
	for env, path := range map[string]string{"ATTAIN_TOPICS_ANSWERS": "topics.answers", "ATTAIN_BATCH_INTERVAL": "batch.interval", "ATTAIN_BROKERS": "brokers"} {
		if k := byEnv[env]; k == nil || k.path != path {
			t.Errorf("%s does not name %s", env, path)
		}
	}
}

func TestReference(t *testing.T) {
	ref := Reference()
	lines := strings.Split(strings.TrimSpace(ref), "\n")
	rows := 0
	for _, l := range lines {
		if strings.HasPrefix(l, "| `") {
			rows++
			if strings.Count(l, " | ") != 4 {
				t.Errorf("row does not have 5 cells: %q", l)
			}
		}
	}
	if rows != len(allKeys) {
		t.Errorf("%d key rows, want %d", rows, len(allKeys))
	}
	for _, k := range allKeys {
		if !strings.Contains(ref, "| `"+k.path+"` | `"+k.env+"` |") {
			t.Errorf("Reference lacks the row of %s", k.path)
		}
	}
	if !strings.Contains(ref, "| `batch.interval` | `ATTAIN_BATCH_INTERVAL` |  | `100ms` |") ||
		!strings.Contains(ref, "| `data_dir` | `ATTAIN_DATA_DIR` | `--data-dir` | `attain-data` |") {
		t.Errorf("Reference rows are not as expected:\n%s", ref)
	}
}

// TestDocTable checks that doc.go's key table is the generated one: when a
// key changes, paste the output of docTable into doc.go.
func TestDocTable(t *testing.T) {
	f, err := parser.ParseFile(token.NewFileSet(), "doc.go", nil, parser.ParseComments|parser.PackageClauseOnly)
	if err != nil {
		t.Fatal(err)
	}
	doc := f.Doc.Text()
	var got []string
	for _, l := range strings.Split(doc, "\n") {
		if fields := strings.Fields(l); len(fields) == 4 && (strings.HasPrefix(fields[1], "ATTAIN_") || fields[1] == "environment") {
			got = append(got, strings.Join(fields, " "))
		}
	}
	var want []string
	for _, r := range docTable() {
		want = append(want, strings.Join(strings.Fields(r), " "))
	}
	if !slices.Equal(got, want) {
		t.Errorf("doc.go's key table is stale:\ngot\n%s\nwant\n%s", strings.Join(got, "\n"), strings.Join(docTable(), "\n"))
	}
}
