package stream

import (
	"os"
	"runtime/pprof"
	"testing"
)

// Temporary: profile the attain phase alone.
func BenchmarkZZAttainOnly(b *testing.B) {
	n := 300_000
	br := startTestBroker(b, 4)
	answers := cohort(42, 5000, n)
	produce(b, br.Addr(), tAnswers, answerMessages(answers))
	raw := rawRate(b, br.Addr(), 4, n)
	f, _ := os.Create(os.Getenv("ZZPROF"))
	pprof.StartCPUProfile(f)
	at := attainRate(b, br.Addr(), n, 0)
	pprof.StopCPUProfile()
	f.Close()
	b.ReportMetric(raw, "raw")
	b.ReportMetric(at, "attain")
	b.ReportMetric(at/raw, "ratio")
}
