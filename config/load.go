package config

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"reflect"
	"slices"
	"strings"

	"go.yaml.in/yaml/v3"
)

// Load builds a configuration from, in increasing precedence: Default(),
// the YAML file at path, the ATTAIN_* variables of environ (as
// os.Environ()), and the flags that were set on fs (fs.Visit; fs may be
// nil, and only flags registered by RegisterFlags count). A path of "" means
// the file named by ATTAIN_CONFIG, or no file when that is unset too.
//
// The file is decoded strictly: an unknown key is an error naming it (with
// the nearest known key when one is close), as is a value of the wrong
// type, a key given twice, or a second YAML document. An ATTAIN_* variable
// that is not a key, or whose value does not parse, is an error naming the
// variable. Every such problem is reported at once, joined; each matches
// ErrInvalid, and the Config returned with an error is the zero value.
// Load does not call Validate: the caller does, after any adjustments of
// its own.
func Load(path string, environ []string, fs *flag.FlagSet) (Config, error) {
	c := Default()
	var errs []error
	source := "--config"
	if path == "" {
		path = lookupEnv(environ, envConfig)
		source = envConfig
	}
	if path != "" {
		data, err := os.ReadFile(path)
		if err != nil {
			errs = append(errs, &KeyError{
				Key:     source,
				Problem: "cannot read the config file: " + err.Error(),
				Fix:     "check the path given by --config or " + envConfig + ", or leave both unset to use no file",
				cause:   err,
			})
		} else {
			errs = append(errs, decodeFile(data, path, &c)...)
		}
	}
	errs = append(errs, applyEnv(&c, environ)...)
	if fs != nil {
		errs = append(errs, applyFlags(&c, fs)...)
	}
	if len(errs) > 0 {
		return Config{}, errors.Join(errs...)
	}
	return c, nil
}

// lookupEnv returns the last value of name in environ ("" when absent).
func lookupEnv(environ []string, name string) string {
	v := ""
	for _, kv := range environ {
		if k, val, ok := strings.Cut(kv, "="); ok && k == name {
			v = val
		}
	}
	return v
}

// decodeFile decodes one YAML document into c with go.yaml.in/yaml/v3 in
// strict mode (KnownFields). It first walks the document against Config's
// keys so that each problem is reported with its full key path, its line
// and a fix, all at once; yaml's own messages name only the Go type.
func decodeFile(data []byte, file string, c *Config) []error {
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var doc yaml.Node
	if err := dec.Decode(&doc); err != nil {
		if errors.Is(err, io.EOF) {
			return nil // empty file or only comments: nothing set
		}
		return []error{&KeyError{Key: file, Problem: "not valid YAML: " + err.Error(),
			Fix: "correct the YAML syntax at the line given", cause: err}}
	}
	var extra yaml.Node
	switch err := dec.Decode(&extra); {
	case errors.Is(err, io.EOF):
	case err != nil:
		return []error{&KeyError{Key: file, Problem: "not valid YAML: " + err.Error(),
			Fix: "correct the YAML syntax at the line given", cause: err}}
	default:
		return []error{keyError(file, fmt.Sprintf("holds more than one YAML document (the second starts at line %d)", extra.Line),
			"keep one document: remove the '---' separator and what follows, or merge it into the first")}
	}

	w := walker{file: file}
	root := &doc
	if root.Kind == yaml.DocumentNode && len(root.Content) == 1 {
		root = root.Content[0]
	}
	w.mapping(root, reflect.TypeFor[Config](), "")
	if len(w.errs) > 0 {
		return w.errs
	}

	strict := yaml.NewDecoder(bytes.NewReader(data))
	strict.KnownFields(true)
	if err := strict.Decode(c); err != nil && !errors.Is(err, io.EOF) {
		// The walk above catches every problem we know of; this is the
		// backstop for the rest (for instance keys brought in by a YAML
		// merge key, which the walk leaves to yaml).
		return []error{&KeyError{Key: file, Problem: err.Error(),
			Fix: "correct the keys and values at the lines given", cause: err}}
	}
	return nil
}

// walker checks a decoded YAML tree against Config's keys.
type walker struct {
	file string
	errs []error
}

func (w *walker) at(n *yaml.Node) string {
	return fmt.Sprintf("line %d of %s", n.Line, w.file)
}

func (w *walker) add(key, problem, fix string) {
	w.errs = append(w.errs, keyError(key, problem, fix))
}

// resolve follows an alias (one level: yaml.v3 resolves anchors to nodes).
func resolve(n *yaml.Node) *yaml.Node {
	for i := 0; n.Kind == yaml.AliasNode && n.Alias != nil && i < 8; i++ {
		n = n.Alias
	}
	return n
}

func isNull(n *yaml.Node) bool {
	return n.Kind == yaml.ScalarNode && n.ShortTag() == "!!null"
}

// mapping checks a mapping node against struct type t, whose keys have
// the path prefix prefix ("" or "batch.").
func (w *walker) mapping(n *yaml.Node, t reflect.Type, prefix string) {
	n = resolve(n)
	section := strings.TrimSuffix(prefix, ".")
	if isNull(n) {
		return // "batch:" with nothing under it: keep the defaults
	}
	if n.Kind != yaml.MappingNode {
		name := section
		if name == "" {
			name = w.file
		}
		w.add(name, fmt.Sprintf("must be a mapping of keys, not %s (%s)", describe(n), w.at(n)),
			"write it as key: value lines"+underWhat(section))
		return
	}
	fields := map[string]reflect.StructField{}
	var names []string
	for i := range t.NumField() {
		f := t.Field(i)
		name, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
		if name != "" && name != "-" {
			fields[name] = f
			names = append(names, name)
		}
	}
	seen := map[string]int{}
	for i := 0; i+1 < len(n.Content); i += 2 {
		kn, vn := resolve(n.Content[i]), n.Content[i+1]
		if kn.Kind != yaml.ScalarNode {
			w.add(orFile(section, w.file), fmt.Sprintf("has a key that is not a plain name (%s)", w.at(kn)),
				"use plain key names such as "+prefix+names[0])
			continue
		}
		name := kn.Value
		if name == "<<" {
			continue // merge key: left to yaml's strict decoder
		}
		path := prefix + name
		if name == "" {
			path = prefix + `""` // an empty key still needs a visible name
		}
		if line, dup := seen[name]; dup {
			w.add(path, fmt.Sprintf("is set twice (lines %d and %d of %s)", line, kn.Line, w.file),
				"keep one of the two")
			continue
		}
		seen[name] = kn.Line
		f, ok := fields[name]
		if !ok {
			w.add(path, fmt.Sprintf("unknown key (%s)", w.at(kn)), w.unknownFix(name, prefix, names))
			continue
		}
		if f.Type.Kind() == reflect.Struct && f.Type != durType {
			w.mapping(vn, f.Type, path+".")
			continue
		}
		w.leaf(vn, byPath[path])
	}
}

// unknownFix suggests what an unknown key name was meant to be.
func (w *walker) unknownFix(name, prefix string, siblings []string) string {
	if s, ok := closest(name, siblings); ok {
		return "did you mean " + prefix + s + "?"
	}
	// The right name in the wrong section ("interval" at the top level).
	var elsewhere []string
	for _, k := range allKeys {
		last := k.path[strings.LastIndexByte(k.path, '.')+1:]
		if last == name || strings.HasPrefix(k.path, name+".") {
			elsewhere = append(elsewhere, k.path)
		}
	}
	if len(elsewhere) > 0 {
		return "did you mean " + strings.Join(elsewhere, " or ") + "? (check the indentation)"
	}
	var paths []string
	for _, k := range allKeys {
		paths = append(paths, k.path)
	}
	if s, ok := closest(prefix+name, paths); ok {
		return "did you mean " + s + "?"
	}
	return "remove it; the keys" + underWhat(strings.TrimSuffix(prefix, ".")) + " are " + strings.Join(siblings, ", ")
}

func underWhat(section string) string {
	if section == "" {
		return " at the top level"
	}
	return " under " + section + ":"
}

func orFile(section, file string) string {
	if section == "" {
		return file
	}
	return section
}

// describe names a node's kind for an error message.
func describe(n *yaml.Node) string {
	switch n.Kind {
	case yaml.SequenceNode:
		return "a list"
	case yaml.MappingNode:
		return "a mapping"
	case yaml.ScalarNode:
		return quote(n.Value)
	}
	return "an alias"
}

// leaf checks that a value node decodes into k's type.
func (w *walker) leaf(n *yaml.Node, k *key) {
	n = resolve(n)
	if isNull(n) {
		return // "data_dir:" with no value keeps the default (a list becomes empty)
	}
	if k.typ == listType {
		if n.Kind != yaml.SequenceNode {
			w.add(k.path, fmt.Sprintf("must be a list, not %s (%s)", describe(n), w.at(n)),
				"write it as "+k.yamlExample()+", or as lines starting with '- '")
			return
		}
		for _, it := range n.Content {
			if it = resolve(it); it.Kind != yaml.ScalarNode {
				w.add(k.path, fmt.Sprintf("items must be plain strings, not %s (%s)", describe(it), w.at(it)),
					"write it as "+k.yamlExample())
				return
			}
		}
		return
	}
	if n.Kind != yaml.ScalarNode {
		w.add(k.path, fmt.Sprintf("must be %s, not %s (%s)", k.kind(), describe(n), w.at(n)),
			"set "+k.path+" to "+k.yamlExample())
		return
	}
	if err := n.Decode(reflect.New(k.typ).Interface()); err != nil {
		w.add(k.path, fmt.Sprintf("%s is not %s (%s)", quote(n.Value), k.kind(), w.at(n)),
			"set "+k.path+" to "+k.yamlExample())
	}
}

// applyEnv sets the keys named by ATTAIN_* variables.
func applyEnv(c *Config, environ []string) []error {
	vals := map[string]string{}
	for _, kv := range environ {
		name, val, ok := strings.Cut(kv, "=")
		if ok && strings.HasPrefix(name, "ATTAIN_") && name != envConfig {
			vals[name] = val
		}
	}
	var names, known []string
	for name := range vals {
		names = append(names, name)
	}
	slices.Sort(names)
	for _, k := range allKeys {
		known = append(known, k.env)
	}
	var errs []error
	for _, name := range names {
		k, ok := byEnv[name]
		if !ok {
			fix := "unset it; attain reads only the ATTAIN_* variables of its configuration reference (and " + envConfig + ")"
			if s, ok := closest(name, known); ok {
				fix = "did you mean " + s + "? rename it, or unset it"
			}
			errs = append(errs, keyError(name, "not a configuration variable", fix))
			continue
		}
		v, err := k.parse(vals[name])
		if err != nil {
			errs = append(errs, keyError(name, fmt.Sprintf("%s is not %s (key %s)", quote(vals[name]), k.kind(), k.path),
				"set "+name+" to "+k.example()+", or unset it"))
			continue
		}
		k.field(c).Set(v)
	}
	return errs
}

// flagValue is the flag.Value of a key's flag. It holds the text; Load
// applies it, so that the flag outranks the file and the environment
// whatever order things happen in.
type flagValue struct {
	k    *key
	text string
}

func (f *flagValue) String() string {
	if f == nil {
		return ""
	}
	return f.text
}

func (f *flagValue) Set(s string) error {
	if _, err := f.k.parse(s); err != nil {
		return fmt.Errorf("%w: %s is not %s; fix: give --%s %s", ErrInvalid, quote(s), f.k.kind(), f.k.flag, f.k.example())
	}
	f.text = s
	return nil
}

// RegisterFlags registers on fs the flags that have config keys: --brokers
// (comma-separated), --data-dir, --http-addr, --params and
// --embedded-broker-addr. c supplies the defaults shown by -h; the flags do
// not write into c: pass fs to Load after fs.Parse, and Load applies the
// flags that were set. (--config is the command's own flag: it passes the
// path to Load.)
func (c *Config) RegisterFlags(fs *flag.FlagSet) {
	for _, k := range allKeys {
		if k.flag == "" {
			continue
		}
		usage := k.meaning + " (config key " + k.path + ", env " + k.env + ")"
		fs.Var(&flagValue{k: k, text: format(k.field(c))}, k.flag, usage)
	}
}

// applyFlags sets the keys of the flags that were set on fs.
func applyFlags(c *Config, fs *flag.FlagSet) []error {
	var errs []error
	fs.Visit(func(f *flag.Flag) {
		fv, ok := f.Value.(*flagValue)
		if !ok || fv.k == nil {
			return // another flag of the command
		}
		v, err := fv.k.parse(fv.text)
		if err != nil { // only when the value was not set through Set
			errs = append(errs, keyError("--"+f.Name, fmt.Sprintf("%s is not %s", quote(fv.text), fv.k.kind()),
				"give --"+f.Name+" "+fv.k.example()))
			return
		}
		fv.k.field(c).Set(v)
	})
	return errs
}
