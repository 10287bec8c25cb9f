package config

import (
	"fmt"
	"strings"
)

// Reference returns the configuration reference as Markdown: one table row
// per key with its environment variable, flag, default and meaning, in
// the order of the Config struct. It is generated from the same table that
// Load uses, so it cannot drift from the code.
func Reference() string {
	var b strings.Builder
	b.WriteString("| key | environment | flag | default | meaning |\n")
	b.WriteString("| --- | --- | --- | --- | --- |\n")
	fmt.Fprintf(&b, "| (config file) | `%s` | `--config` | none | Path of the YAML config file; the flag is the command's own. |\n", envConfig)
	def := Default()
	for _, k := range allKeys {
		flag := ""
		if k.flag != "" {
			flag = "`--" + k.flag + "`"
		}
		fmt.Fprintf(&b, "| `%s` | `%s` | %s | %s | %s |\n", k.path, k.env, flag, mdDefault(k, &def), strings.ReplaceAll(k.meaning, "|", `\|`))
	}
	b.WriteString("\nPrecedence: defaults < config file < environment < flags. ")
	b.WriteString("Durations are Go durations (`100ms`, `1h`). In the environment and on flags, lists are comma-separated ")
	b.WriteString("(`ATTAIN_BROKERS=kafka-1:9092,kafka-2:9092`) and booleans take `true`/`false`/`1`/`0`. ")
	b.WriteString("An unknown key or `ATTAIN_` variable, or a value that does not parse, is an error naming it.\n")
	return b.String()
}

func mdDefault(k *key, def *Config) string {
	s := format(k.field(def))
	if s == "" {
		if k.typ == listType {
			return "`[]`"
		}
		return "`\"\"`"
	}
	return "`" + s + "`"
}

// docTable is the key table of the package documentation (doc.go), without
// the meanings; a test checks that doc.go holds exactly these rows.
func docTable() []string {
	def := Default()
	rows := []string{fmt.Sprintf("%-27s %-34s %-22s %s", "key", "environment", "flag", "default")}
	for _, k := range allKeys {
		flag := "-"
		if k.flag != "" {
			flag = "--" + k.flag
		}
		d := format(k.field(&def))
		switch {
		case d == "" && k.typ == listType:
			d = "[]"
		case d == "":
			d = `""`
		}
		rows = append(rows, fmt.Sprintf("%-27s %-34s %-22s %s", k.path, k.env, flag, d))
	}
	return rows
}
