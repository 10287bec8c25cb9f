package config

import (
	"bufio"
	"bytes"
	"errors"
	"io"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

// The deploy/ folder holds what a platform team deploys; these tests keep
// it consistent with the config package and with itself.

const deployDir = "../deploy"

// manifests decodes every YAML document of a Kubernetes manifest file.
func manifests(t *testing.T, name string) []map[string]any {
	t.Helper()
	data, err := os.ReadFile(filepath.Join(deployDir, "kubernetes", name))
	if err != nil {
		t.Fatal(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var docs []map[string]any
	for {
		var m map[string]any
		err := dec.Decode(&m)
		if errors.Is(err, io.EOF) {
			return docs
		}
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		docs = append(docs, m)
	}
}

// dig follows keys (string) and list indexes (int) through decoded YAML.
func dig(t *testing.T, v any, path ...any) any {
	t.Helper()
	for _, p := range path {
		switch p := p.(type) {
		case string:
			m, ok := v.(map[string]any)
			if !ok {
				t.Fatalf("at %q: not a mapping: %v", p, v)
			}
			v = m[p]
		case int:
			l, ok := v.([]any)
			if !ok || p >= len(l) {
				t.Fatalf("at [%d]: not a long enough list: %v", p, v)
			}
			v = l[p]
		}
	}
	return v
}

// mebibytes parses a memory quantity in MiB: Kubernetes "512Mi"/"1Gi", Go's
// GOMEMLIMIT "320MiB", systemd "512M" (base 1024 in systemd).
func mebibytes(t *testing.T, s string) int {
	t.Helper()
	for _, u := range []struct {
		suffix string
		mul    int
	}{{"GiB", 1024}, {"MiB", 1}, {"Gi", 1024}, {"Mi", 1}, {"G", 1024}, {"M", 1}} {
		if n, ok := strings.CutSuffix(s, u.suffix); ok {
			v, err := strconv.Atoi(n)
			if err != nil {
				t.Fatalf("quantity %q: %v", s, err)
			}
			return v * u.mul
		}
	}
	t.Fatalf("quantity %q: unknown unit", s)
	return 0
}

// pebbleMiB is the store's memory outside the Go heap (in a cgo build):
// Pebble's cache, cache.block_cache_mb. The memtables are inside it:
// Pebble reserves each one in the cache (pebble/v2 db.go, newMemTable:
// Cache.Reserve), and the store's default memtable, which
// Config.StoreOptions leaves alone, is a third of the cache (state
// defaultMemTableBytes: two queued before writes stall, one kept for
// reuse).
func pebbleMiB(cfg Config) int { return cfg.Cache.BlockCacheMB }

// configMapConfig loads and validates the config held by the ConfigMap.
func configMapConfig(t *testing.T) Config {
	t.Helper()
	docs := manifests(t, "configmap.yaml")
	if len(docs) != 1 || docs[0]["kind"] != "ConfigMap" {
		t.Fatalf("configmap.yaml: want one ConfigMap, got %v", docs)
	}
	text, ok := dig(t, docs[0], "data", "attain.yaml").(string)
	if !ok || text == "" {
		t.Fatal("ConfigMap has no data attain.yaml")
	}
	path := filepath.Join(t.TempDir(), "attain.yaml")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	c, err := loadAndValidate(path, nil)
	if err != nil {
		t.Fatalf("the ConfigMap's config:\n%v", err)
	}
	return c
}

func TestKubernetes(t *testing.T) {
	cfg := configMapConfig(t)
	if len(cfg.Brokers) == 0 {
		t.Error("the ConfigMap's config starts the embedded broker; a cluster deployment lists brokers")
	}
	_, port, err := net.SplitHostPort(cfg.HTTPAddr)
	if err != nil || !strings.HasPrefix(cfg.HTTPAddr, ":") && !strings.HasPrefix(cfg.HTTPAddr, "0.0.0.0:") {
		t.Fatalf("http_addr %q must listen on every interface for probes and the Service", cfg.HTTPAddr)
	}

	sts := manifests(t, "statefulset.yaml")
	if len(sts) != 1 || sts[0]["kind"] != "StatefulSet" {
		t.Fatalf("statefulset.yaml: want one StatefulSet")
	}
	pod := dig(t, sts[0], "spec", "template", "spec")
	ctr := dig(t, pod, "containers", 0)

	// attain run with the mounted config.
	args, _ := dig(t, ctr, "args").([]any)
	if len(args) != 3 || args[0] != "run" || args[1] != "--config" || args[2] != "/etc/attain/attain.yaml" {
		t.Errorf("args %v, want run --config /etc/attain/attain.yaml", args)
	}
	mounts := map[string]string{}
	for _, m := range dig(t, ctr, "volumeMounts").([]any) {
		mounts[dig(t, m, "name").(string)] = dig(t, m, "mountPath").(string)
	}
	if mounts["config"] != "/etc/attain" {
		t.Errorf("config mounted at %q", mounts["config"])
	}
	if !strings.HasPrefix(cfg.DataDir, mounts["data"]+"/") && cfg.DataDir != mounts["data"] {
		t.Errorf("data_dir %q is not on the persistent volume mounted at %q", cfg.DataDir, mounts["data"])
	}
	if n := dig(t, sts[0], "spec", "volumeClaimTemplates", 0, "metadata", "name"); n != "data" {
		t.Errorf("volume claim template %v, want data", n)
	}

	// Probes on the HTTP port of the config.
	if p := dig(t, ctr, "ports", 0); dig(t, p, "name") != "http" || strconv.Itoa(dig(t, p, "containerPort").(int)) != port {
		t.Errorf("container port %v does not match http_addr %q", p, cfg.HTTPAddr)
	}
	for probe, path := range map[string]string{"readinessProbe": "/readyz", "livenessProbe": "/healthz", "startupProbe": "/healthz"} {
		if got := dig(t, ctr, probe, "httpGet", "path"); got != path {
			t.Errorf("%s path %v, want %s", probe, got, path)
		}
		if got := dig(t, ctr, probe, "httpGet", "port"); got != "http" {
			t.Errorf("%s port %v, want http", probe, got)
		}
	}

	// Memory: GOMEMLIMIT plus Pebble's memory outside the Go heap must fit
	// in the container limit with room to spare.
	limit := mebibytes(t, dig(t, ctr, "resources", "limits", "memory").(string))
	gomem := 0
	for _, e := range dig(t, ctr, "env").([]any) {
		if dig(t, e, "name") == "GOMEMLIMIT" {
			gomem = mebibytes(t, dig(t, e, "value").(string))
		}
	}
	offHeap := pebbleMiB(cfg)
	if gomem == 0 || gomem+offHeap > limit*85/100 {
		t.Errorf("GOMEMLIMIT %d MiB + Pebble %d MiB leaves less than 15%% of the %d MiB limit as headroom", gomem, offHeap, limit)
	}
	if req := mebibytes(t, dig(t, ctr, "resources", "requests", "memory").(string)); req != limit {
		t.Errorf("memory request %d MiB != limit %d MiB", req, limit)
	}

	// Services select the pods and expose the named port.
	labels := dig(t, sts[0], "spec", "template", "metadata", "labels").(map[string]any)
	svcs := manifests(t, "service.yaml")
	headless := false
	for _, s := range svcs {
		for k, v := range dig(t, s, "spec", "selector").(map[string]any) {
			if labels[k] != v {
				t.Errorf("service %v selects %s=%v, which the pods lack", dig(t, s, "metadata", "name"), k, v)
			}
		}
		if dig(t, s, "spec", "ports", 0, "targetPort") != "http" {
			t.Errorf("service %v does not target the http port", dig(t, s, "metadata", "name"))
		}
		if dig(t, s, "metadata", "name") == dig(t, sts[0], "spec", "serviceName") {
			headless = dig(t, s, "spec", "clusterIP") == "None"
		}
	}
	if !headless {
		t.Error("the StatefulSet's serviceName is not a headless Service of service.yaml")
	}
	cm := dig(t, pod, "volumes")
	found := false
	for _, v := range cm.([]any) {
		if dig(t, v, "name") == "config" {
			found = dig(t, v, "configMap", "name") == dig(t, manifests(t, "configmap.yaml")[0], "metadata", "name")
		}
	}
	if !found {
		t.Error("the config volume does not mount the ConfigMap of configmap.yaml")
	}
}

func TestSystemdUnit(t *testing.T) {
	f, err := os.Open(filepath.Join(deployDir, "attain.service"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	dirs := map[string][]string{}
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		l := strings.TrimSpace(sc.Text())
		if l == "" || strings.HasPrefix(l, "#") || strings.HasPrefix(l, "[") {
			continue
		}
		k, v, ok := strings.Cut(l, "=")
		if !ok {
			t.Fatalf("not a directive: %q", l)
		}
		dirs[k] = append(dirs[k], v)
	}
	one := func(k string) string {
		if len(dirs[k]) != 1 {
			t.Fatalf("%s set %d times", k, len(dirs[k]))
		}
		return dirs[k][0]
	}
	env := map[string]string{}
	for _, e := range dirs["Environment"] {
		k, v, _ := strings.Cut(e, "=")
		env[k] = v
	}

	// The unit runs `attain run` on the example config, whose keys hold.
	exec := strings.Fields(one("ExecStart"))
	if len(exec) != 4 || exec[1] != "run" || exec[2] != "--config" {
		t.Fatalf("ExecStart %v", exec)
	}
	if exec[3] != "/etc/attain/attain.yaml" || one("ConfigurationDirectory") != "attain" {
		t.Errorf("config %s is not in ConfigurationDirectory /etc/attain", exec[3])
	}
	var environ []string
	for k, v := range env {
		if strings.HasPrefix(k, "ATTAIN_") {
			environ = append(environ, k+"="+v)
		}
	}
	cfg, err := loadAndValidate(filepath.Join(deployDir, "attain.yaml"), environ)
	if err != nil {
		t.Fatalf("deploy/attain.yaml with the unit's environment: %v", err)
	}
	if cfg.DataDir != "/var/lib/"+one("StateDirectory") {
		t.Errorf("data_dir %q is not the StateDirectory /var/lib/%s", cfg.DataDir, one("StateDirectory"))
	}

	// Memory, as for Kubernetes.
	gomem, memMax := mebibytes(t, env["GOMEMLIMIT"]), mebibytes(t, one("MemoryMax"))
	if offHeap := pebbleMiB(cfg); gomem+offHeap > memMax*85/100 {
		t.Errorf("GOMEMLIMIT %d MiB + Pebble %d MiB leaves less than 15%% of MemoryMax %d MiB", gomem, offHeap, memMax)
	}

	// Hardening that must stay.
	for k, v := range map[string]string{
		"DynamicUser": "yes", "NoNewPrivileges": "yes", "ProtectSystem": "strict", "ProtectHome": "yes",
		"PrivateTmp": "yes", "PrivateDevices": "yes", "CapabilityBoundingSet": "", "RestrictAddressFamilies": "AF_INET AF_INET6 AF_UNIX",
	} {
		if got := one(k); got != v {
			t.Errorf("%s=%s, want %s", k, got, v)
		}
	}
}
