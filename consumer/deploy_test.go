package consumer

import (
	"bufio"
	"bytes"
	"errors"
	"io"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/spf13/pflag"
	"gopkg.in/yaml.v3"
)

// Checks of the files under deploy/ against the code they configure: flags,
// environment variables, config keys, probe paths and metric names must
// exist, so a rename in the code fails here instead of in production.

const deployDir = "../deploy"

// yamlDocs decodes every document of a (multi-document) YAML file.
func yamlDocs(t *testing.T, path string) []map[string]any {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(b))
	var docs []map[string]any
	for {
		var d map[string]any
		err := dec.Decode(&d)
		if errors.Is(err, io.EOF) {
			return docs
		}
		if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		if d != nil {
			docs = append(docs, d)
		}
	}
}

// at walks a decoded YAML tree by map keys and list indices; nil if absent.
func at(v any, path ...any) any {
	for _, p := range path {
		switch k := p.(type) {
		case string:
			m, ok := v.(map[string]any)
			if !ok {
				return nil
			}
			v = m[k]
		case int:
			l, ok := v.([]any)
			if !ok || k >= len(l) {
				return nil
			}
			v = l[k]
		}
	}
	return v
}

func str(v any) string {
	switch x := v.(type) {
	case string:
		return x
	case int:
		return strconv.Itoa(x)
	}
	return ""
}

// flagsIn returns the long flag names (without "--" and "=value") of args.
func flagsIn(args []string) []string {
	var out []string
	for _, a := range args {
		if name, ok := strings.CutPrefix(a, "--"); ok {
			name, _, _ = strings.Cut(name, "=")
			out = append(out, name)
		}
	}
	return out
}

// parseRunArgs parses `ripen run` flags the way the command does.
func parseRunArgs(t *testing.T, args []string) *FlagOverrides {
	t.Helper()
	fs := pflag.NewFlagSet("run", pflag.ContinueOnError)
	fs.SetOutput(io.Discard)
	o := BindFlags(fs)
	if err := fs.Parse(args); err != nil {
		t.Fatalf("flags %q: %v", args, err)
	}
	return o
}

func TestDeployExampleConfig(t *testing.T) {
	path := filepath.Join(deployDir, "ripen.example.yaml")
	cfg, err := LoadConfig(path, nil, nil)
	if err != nil {
		t.Fatalf("example config: %v", err)
	}
	if len(cfg.Experiments) == 0 {
		t.Error("example config shows no per-experiment override")
	}
	// It claims to show the defaults: apart from the overrides it must
	// equal the built-in defaults.
	got := cfg
	got.Experiments = nil
	want := Config{}.WithDefaults()
	if got.Defaults.Paused != nil && len(got.Defaults.Paused) == 0 && want.Defaults.Paused == nil {
		got.Defaults.Paused = nil // paused: [] and absent both pause nothing
	}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("example config is not the defaults it documents:\n got  %+v\n want %+v", got, want)
	}
	// Every setting is mentioned (set, or commented out where setting it
	// would need other settings).
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var missing []string
	var visit func(t reflect.Type, key string)
	visit = func(tp reflect.Type, key string) {
		for name, f := range yamlFields(tp) {
			k := joinPath(key, name)
			if !regexp.MustCompile(`(?m)^\s*(#\s*)?` + regexp.QuoteMeta(name) + `[:,]`).Match(b) {
				missing = append(missing, k)
			}
			if f.Type.Kind() == reflect.Struct && f.Type != durationType {
				visit(f.Type, k)
			}
		}
	}
	visit(reflect.TypeFor[Config](), "")
	slices.Sort(missing)
	if len(missing) > 0 {
		t.Errorf("example config does not document %v", missing)
	}
}

// k8sObjects reads every manifest under deploy/k8s by kind.
func k8sObjects(t *testing.T) map[string][]map[string]any {
	t.Helper()
	files, err := filepath.Glob(filepath.Join(deployDir, "k8s", "*.yaml"))
	if err != nil || len(files) == 0 {
		t.Fatalf("no manifests under deploy/k8s: %v", err)
	}
	objs := map[string][]map[string]any{}
	for _, f := range files {
		for _, d := range yamlDocs(t, f) {
			kind := str(d["kind"])
			if kind == "" {
				t.Errorf("%s: document without kind", f)
			}
			objs[kind] = append(objs[kind], d)
		}
	}
	return objs
}

func only(t *testing.T, objs map[string][]map[string]any, kind string) map[string]any {
	t.Helper()
	if len(objs[kind]) != 1 {
		t.Fatalf("want one %s manifest, have %d", kind, len(objs[kind]))
	}
	return objs[kind][0]
}

func TestDeployKubernetes(t *testing.T) {
	objs := k8sObjects(t)
	dep := only(t, objs, "Deployment")
	cm := only(t, objs, "ConfigMap")
	secret := only(t, objs, "Secret")
	svc := only(t, objs, "Service")
	pdb := only(t, objs, "PodDisruptionBudget")
	if str(at(pdb, "apiVersion")) != "policy/v1" {
		t.Errorf("PodDisruptionBudget apiVersion %q, want policy/v1", at(pdb, "apiVersion"))
	}

	pod := at(dep, "spec", "template")
	podLabels, _ := at(pod, "metadata", "labels").(map[string]any)
	if len(podLabels) == 0 {
		t.Fatal("pod template has no labels")
	}
	selects := func(what string, sel any) {
		m, _ := sel.(map[string]any)
		if len(m) == 0 {
			t.Errorf("%s: empty selector", what)
		}
		for k, v := range m {
			if podLabels[k] != v {
				t.Errorf("%s: selector %s=%v does not match the pod labels %v", what, k, v, podLabels)
			}
		}
	}
	selects("Deployment", at(dep, "spec", "selector", "matchLabels"))
	selects("Service", at(svc, "spec", "selector"))
	selects("PodDisruptionBudget", at(pdb, "spec", "selector", "matchLabels"))

	containers, _ := at(pod, "spec", "containers").([]any)
	if len(containers) != 1 {
		t.Fatalf("want one container, have %d", len(containers))
	}
	c := containers[0]

	// Arguments: `run` and flags that exist.
	var args []string
	for _, a := range at(c, "args").([]any) {
		args = append(args, str(a))
	}
	if len(args) == 0 || args[0] != "run" {
		t.Fatalf("container args %q do not start with run", args)
	}
	for _, f := range flagsIn(args) {
		if !slices.Contains(FlagNames(), f) {
			t.Errorf("container flag --%s is not a flag of ripen run (%v)", f, FlagNames())
		}
	}
	flags := parseRunArgs(t, args[1:])

	// Environment: RIPEN_* names that exist; secrets from the Secret.
	env := map[string]string{}
	secretData, _ := at(secret, "stringData").(map[string]any)
	for _, e := range at(c, "env").([]any) {
		name := str(at(e, "name"))
		if strings.HasPrefix(name, "RIPEN_") && !slices.Contains(EnvNames(), name) {
			t.Errorf("env %s is not read by the configuration", name)
		}
		if ref := at(e, "valueFrom", "secretKeyRef"); ref != nil {
			if str(at(ref, "name")) != str(at(secret, "metadata", "name")) {
				t.Errorf("env %s: secret %q, the manifests define %q", name, at(ref, "name"), at(secret, "metadata", "name"))
			}
			v, ok := secretData[str(at(ref, "key"))]
			if !ok {
				t.Errorf("env %s: key %q not in the example Secret", name, at(ref, "key"))
			}
			env[name] = str(v)
			continue
		}
		env[name] = str(at(e, "value"))
	}
	if len(env) == 0 {
		t.Error("no environment variables: secrets must come from the Secret")
	}

	// Ports and probes.
	ports := map[string]int{}
	for _, p := range at(c, "ports").([]any) {
		ports[str(at(p, "name"))] = at(p, "containerPort").(int)
	}
	resolve := func(p any) int {
		if n, ok := p.(int); ok {
			return n
		}
		return ports[str(p)]
	}
	for _, pr := range []struct{ probe, path string }{{"livenessProbe", "/livez"}, {"readinessProbe", "/readyz"}} {
		if got := str(at(c, pr.probe, "httpGet", "path")); got != pr.path {
			t.Errorf("%s path %q, want %s", pr.probe, got, pr.path)
		}
		if got := resolve(at(c, pr.probe, "httpGet", "port")); got != 9464 {
			t.Errorf("%s port %d, want 9464", pr.probe, got)
		}
	}
	if got := resolve(at(svc, "spec", "ports", 0, "targetPort")); got != 9464 {
		t.Errorf("Service targets port %d, want 9464", got)
	}
	for _, kind := range []string{"requests", "limits"} {
		for _, res := range []string{"cpu", "memory"} {
			if at(c, "resources", kind, res) == nil {
				t.Errorf("container has no %s.%s", kind, res)
			}
		}
	}

	// The ConfigMap's config, with the Deployment's flags and environment,
	// loads, validates and listens where the probes look.
	mountPath := ""
	for _, vm := range at(c, "volumeMounts").([]any) {
		vol := str(at(vm, "name"))
		for _, v := range at(pod, "spec", "volumes").([]any) {
			if str(at(v, "name")) == vol && str(at(v, "configMap", "name")) == str(at(cm, "metadata", "name")) {
				mountPath = str(at(vm, "mountPath"))
			}
		}
	}
	cfgPath := flags.ConfigPath()
	key, ok := strings.CutPrefix(cfgPath, mountPath+"/")
	if mountPath == "" || !ok {
		t.Fatalf("--config %q is not in the ConfigMap mounted at %q", cfgPath, mountPath)
	}
	text, ok := at(cm, "data", key).(string)
	if !ok {
		t.Fatalf("ConfigMap has no key %q", key)
	}
	local := filepath.Join(t.TempDir(), key)
	if err := os.WriteFile(local, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	lookup := func(k string) (string, bool) { v, ok := env[k]; return v, ok }
	cfg, err := LoadConfig(local, lookup, nil)
	if err != nil {
		t.Fatalf("ConfigMap config with the Deployment's environment: %v", err)
	}
	if err := flags.Apply(&cfg); err != nil {
		t.Fatalf("Deployment flags: %v", err)
	}
	if err := cfg.WithDefaults().Validate(); err != nil {
		t.Fatalf("config with the Deployment's flags: %v", err)
	}
	host, port, _ := net.SplitHostPort(cfg.HTTP)
	if port != "9464" || (host != "" && host != "0.0.0.0" && host != "::") {
		t.Errorf("config listens on %q; the probes need all interfaces on port 9464", cfg.HTTP)
	}
	grace, _ := at(pod, "spec", "terminationGracePeriodSeconds").(int)
	if time.Duration(grace)*time.Second <= cfg.ShutdownTimeout {
		t.Errorf("terminationGracePeriodSeconds %d does not exceed shutdown_timeout %v", grace, cfg.ShutdownTimeout)
	}
}

// registeredMetrics gathers the names NewMetrics registers; labelled
// vectors get one child so that they are gathered.
func registeredMetrics(t *testing.T) []string {
	t.Helper()
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg)
	m.EventsConsumed.WithLabelValues("clicks")
	m.ConsumerLag.WithLabelValues("clicks", "0")
	fams, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, f := range fams {
		names = append(names, f.GetName())
	}
	return names
}

func TestDeployAlertRules(t *testing.T) {
	known := registeredMetrics(t)
	docs := yamlDocs(t, filepath.Join(deployDir, "prometheus", "ripen-alerts.yaml"))
	if len(docs) != 1 {
		t.Fatalf("want one rules document, have %d", len(docs))
	}
	metricRE := regexp.MustCompile(`\bripen_[a-z0-9_]+`)
	used := map[string]bool{}
	groups, _ := docs[0]["groups"].([]any)
	if len(groups) == 0 {
		t.Fatal("no rule groups")
	}
	for _, g := range groups {
		rules, _ := at(g, "rules").([]any)
		for _, r := range rules {
			name, expr := str(at(r, "alert")), str(at(r, "expr"))
			if name == "" || expr == "" || str(at(r, "for")) == "" || str(at(r, "labels", "severity")) == "" || str(at(r, "annotations", "summary")) == "" {
				t.Errorf("rule %q lacks alert, expr, for, severity or summary", name)
			}
			if strings.Count(expr, "(") != strings.Count(expr, ")") || strings.Count(expr, "[") != strings.Count(expr, "]") {
				t.Errorf("rule %s: unbalanced brackets in %q", name, expr)
			}
			ms := metricRE.FindAllString(expr, -1)
			if len(ms) == 0 {
				t.Errorf("rule %s uses no ripen metric", name)
			}
			for _, m := range ms {
				used[m] = true
				if !slices.Contains(known, m) {
					t.Errorf("rule %s uses %s, which NewMetrics does not register (%v)", name, m, known)
				}
			}
		}
	}
	for _, m := range []string{"ripen_consumer_lag", "ripen_events_rejected_total", "ripen_allocations_published_total", "ripen_redis_up", "ripen_watermark_seconds"} {
		if !used[m] {
			t.Errorf("no alert on %s", m)
		}
	}
}

func TestDeploySystemdUnit(t *testing.T) {
	f, err := os.Open(filepath.Join(deployDir, "systemd", "ripen.service"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sections := map[string]map[string]string{}
	cur := ""
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		switch {
		case line == "" || strings.HasPrefix(line, "#") || strings.HasPrefix(line, ";"):
		case strings.HasPrefix(line, "[") && strings.HasSuffix(line, "]"):
			cur = line[1 : len(line)-1]
			sections[cur] = map[string]string{}
		default:
			k, v, ok := strings.Cut(line, "=")
			if !ok || cur == "" {
				t.Fatalf("unit line %q is not key=value in a section", line)
			}
			sections[cur][k] = v
		}
	}
	for _, s := range []string{"Unit", "Service", "Install"} {
		if sections[s] == nil {
			t.Errorf("unit has no [%s] section", s)
		}
	}
	execStart := strings.Fields(sections["Service"]["ExecStart"])
	if len(execStart) < 2 || filepath.Base(execStart[0]) != "ripen" || execStart[1] != "run" {
		t.Fatalf("ExecStart %q does not run `ripen run`", execStart)
	}
	for _, fl := range flagsIn(execStart[2:]) {
		if !slices.Contains(FlagNames(), fl) {
			t.Errorf("ExecStart flag --%s is not a flag of ripen run", fl)
		}
	}
	parseRunArgs(t, execStart[2:])
	stop, err := time.ParseDuration(sections["Service"]["TimeoutStopSec"])
	if err != nil || stop <= DefaultShutdownTimeout {
		t.Errorf("TimeoutStopSec %q must exceed the default shutdown_timeout %v", sections["Service"]["TimeoutStopSec"], DefaultShutdownTimeout)
	}
	for _, line := range strings.Split(sections["Service"]["Environment"], " ") {
		if name, _, ok := strings.Cut(line, "="); ok && strings.HasPrefix(name, "RIPEN_") && !slices.Contains(EnvNames(), name) {
			t.Errorf("Environment %s is not read by the configuration", name)
		}
	}
}

func TestDeployDevStackScript(t *testing.T) {
	path := filepath.Join(deployDir, "dev-stack.sh")
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"redis-server", "devbroker --addr", "127.0.0.1:9092", "6379", "stop)"} {
		if !strings.Contains(string(b), want) {
			t.Errorf("dev-stack.sh lacks %q", want)
		}
	}
	bash, err := exec.LookPath("bash")
	if err != nil {
		t.Skip("bash not on PATH; syntax not checked")
	}
	if out, err := exec.Command(bash, "-n", path).CombinedOutput(); err != nil {
		t.Fatalf("bash -n dev-stack.sh: %v\n%s", err, out)
	}
}
