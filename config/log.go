package config

import (
	"io"
	"time"

	"github.com/mattn/go-isatty"
	"github.com/rs/zerolog"
)

// Logger returns a logger writing to w as the Log section says: JSON lines,
// or zerolog's human-readable console format when log.format is "console",
// or "auto" and isTerminal (colour only on a terminal). Every entry has a
// timestamp. An invalid level (see Validate) falls back to info.
func (c Config) Logger(w io.Writer, isTerminal bool) zerolog.Logger {
	level, err := zerolog.ParseLevel(c.Log.Level)
	if err != nil || c.Log.Level == "" {
		level = zerolog.InfoLevel
	}
	out := w
	if c.Log.Format == "console" || c.Log.Format == "auto" && isTerminal {
		out = zerolog.ConsoleWriter{Out: w, NoColor: !isTerminal, TimeFormat: time.RFC3339}
	}
	return zerolog.New(out).Level(level).With().Timestamp().Logger()
}

// IsTerminal reports whether w is a terminal (a file whose descriptor is a
// tty), the isTerminal argument of Logger: config.IsTerminal(os.Stderr).
func IsTerminal(w io.Writer) bool {
	f, ok := w.(interface{ Fd() uintptr })
	if !ok {
		return false
	}
	return isatty.IsTerminal(f.Fd()) || isatty.IsCygwinTerminal(f.Fd())
}
