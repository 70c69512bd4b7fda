package deploy

import (
	"context"
	"encoding/json"
	"fmt"
	"go/ast"
	"go/parser"
	"go/token"
	"maps"
	"net"
	"net/url"
	"os"
	"os/exec"
	"path"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/internal/sharedtest"
)

// A service of docker-compose.yml, as far as the tests read it.
type service struct {
	name      string
	image     string
	build     map[string]any // nil: no build
	command   []string       // exec form
	env       map[string]string
	mounts    []mount
	ports     []portMap
	dependsOn []string
}

type mount struct {
	source, target string
	bind           bool // source is a host path, else a named volume
}

type portMap struct {
	hostIP, host, container string
}

type composeFile struct {
	services map[string]*service
	volumes  []string
}

// loadCompose reads docker-compose.yml at the repository root.
func loadCompose(t *testing.T) *composeFile {
	t.Helper()
	data, err := os.ReadFile(filepath.Join(sharedtest.Root(t), "docker-compose.yml"))
	if err != nil {
		t.Fatal(err)
	}
	doc, err := parseYAML(string(data))
	if err != nil {
		t.Fatalf("docker-compose.yml: %v", err)
	}
	top := yamlMap(t, doc, "docker-compose.yml")
	cf := &composeFile{services: map[string]*service{}}
	for name := range yamlMap(t, top["volumes"], "volumes") {
		cf.volumes = append(cf.volumes, name)
	}
	for name, v := range yamlMap(t, top["services"], "services") {
		what := "services." + name
		m := yamlMap(t, v, what)
		s := &service{name: name, env: map[string]string{}}
		if m["image"] != nil {
			s.image = yamlString(t, m["image"], what+".image")
		}
		if m["build"] != nil {
			s.build = yamlMap(t, m["build"], what+".build")
		}
		if c, ok := m["command"].(string); ok {
			t.Fatalf("%s.command %q: use the exec form [\"...\", ...] so that its arguments can be checked", what, c)
		}
		s.command = yamlStrings(t, m["command"], what+".command")
		switch e := m["environment"].(type) {
		case map[string]any:
			for k, v := range e {
				s.env[k] = yamlString(t, v, what+".environment."+k)
			}
		case []any:
			for _, kv := range yamlStrings(t, e, what+".environment") {
				k, v, _ := strings.Cut(kv, "=")
				s.env[k] = v
			}
		}
		for _, v := range yamlStrings(t, m["volumes"], what+".volumes") {
			parts := strings.Split(v, ":")
			if len(parts) < 2 || len(parts) > 3 || (len(parts) == 3 && parts[2] != "ro" && parts[2] != "rw") {
				t.Fatalf("%s.volumes %q: want source:target[:ro]", what, v)
			}
			bind := strings.HasPrefix(parts[0], ".") || strings.HasPrefix(parts[0], "/")
			s.mounts = append(s.mounts, mount{source: parts[0], target: parts[1], bind: bind})
		}
		for _, v := range yamlStrings(t, m["ports"], what+".ports") {
			parts := strings.Split(v, ":")
			var p portMap
			switch len(parts) {
			case 1:
				p.container = parts[0]
			case 2:
				p.host, p.container = parts[0], parts[1]
			case 3:
				p.hostIP, p.host, p.container = parts[0], parts[1], parts[2]
			default:
				t.Fatalf("%s.ports %q: want [ip:]host:container", what, v)
			}
			s.ports = append(s.ports, p)
		}
		s.dependsOn = yamlStrings(t, m["depends_on"], what+".depends_on")
		cf.services[name] = s
	}
	return cf
}

// hostPath returns the host file a container path of s maps to through its
// bind mounts (the longest matching target), relative to the repository
// root, or "" if no bind mount holds it.
func (s *service) hostPath(p string) string {
	best, found := "", ""
	for _, m := range s.mounts {
		if !m.bind || len(m.target) <= len(best) {
			continue
		}
		if rel, ok := strings.CutPrefix(p, m.target); ok && (rel == "" || strings.HasPrefix(rel, "/")) {
			best, found = m.target, path.Join(m.source, rel)
		}
	}
	return found
}

// mountOf returns the container path the host path src is mounted at, or "".
func (s *service) mountOf(src string) string {
	for _, m := range s.mounts {
		if m.bind && path.Clean(m.source) == path.Clean(src) {
			return m.target
		}
	}
	return ""
}

// flagValues reads the flags of a command line (after the subcommand):
// "--name value", "--name=value", and "--name" alone (value "") when the next
// argument is another flag or there is none. It does not know which flags
// are booleans; checkArgs does.
func flagValues(args []string) map[string]string {
	vals := map[string]string{}
	for i := 0; i < len(args); i++ {
		name, ok := flagName(args[i])
		if !ok {
			continue
		}
		if n, v, ok := strings.Cut(name, "="); ok {
			vals[n] = v
			continue
		}
		if i+1 < len(args) && !strings.HasPrefix(args[i+1], "-") {
			vals[name] = args[i+1]
			i++
			continue
		}
		vals[name] = ""
	}
	return vals
}

func flagName(arg string) (string, bool) {
	if !strings.HasPrefix(arg, "-") || arg == "-" || arg == "--" {
		return "", false
	}
	return strings.TrimPrefix(strings.TrimPrefix(arg, "-"), "-"), true
}

// isPlumb tells the services running the plumb image.
func (s *service) isPlumb() bool { return s.image == "plumb:dev" }

func (cf *composeFile) natsServices() []string {
	var out []string
	for name, s := range cf.services {
		if strings.HasPrefix(s.image, "nats:") {
			out = append(out, name)
		}
	}
	slices.Sort(out)
	return out
}

// workers returns the services running `plumb run`, sorted by name.
func (cf *composeFile) workers() []*service {
	var out []*service
	for _, name := range slices.Sorted(maps.Keys(cf.services)) {
		if s := cf.services[name]; s.isPlumb() && len(s.command) > 0 && s.command[0] == "run" {
			out = append(out, s)
		}
	}
	return out
}

// envRef matches a compose interpolation "${NAME}", "${NAME:?message}" and
// the like, capturing NAME.
var envRef = regexp.MustCompile(`^\$\{([A-Za-z_][A-Za-z0-9_]*)(?:[:?-][^}]*)?\}$`)

func TestComposeConsistent(t *testing.T) {
	root := sharedtest.Root(t)
	cf := loadCompose(t)
	setPasswords(t)

	t.Run("mounts and builds", func(t *testing.T) {
		for _, s := range cf.services {
			for _, m := range s.mounts {
				if !m.bind {
					if !slices.Contains(cf.volumes, m.source) {
						t.Errorf("%s: volume %s is not declared under volumes", s.name, m.source)
					}
					continue
				}
				if !strings.HasPrefix(m.source, "./deploy/") && !strings.HasPrefix(m.source, "./testdata/") {
					t.Errorf("%s: mount %s: mount files from ./deploy or ./testdata only", s.name, m.source)
				}
				if _, err := os.Stat(filepath.Join(root, filepath.FromSlash(m.source))); err != nil {
					t.Errorf("%s: mount source: %v", s.name, err)
				}
			}
			if s.build != nil {
				ctx := yamlString(t, s.build["context"], s.name+".build.context")
				df := yamlString(t, s.build["dockerfile"], s.name+".build.dockerfile")
				if _, err := os.Stat(filepath.Join(root, ctx, df)); err != nil {
					t.Errorf("%s: dockerfile: %v", s.name, err)
				}
			}
			if s.isPlumb() && s.build == nil {
				t.Errorf("%s: runs plumb:dev without a build section (compose would try to pull it)", s.name)
			}
		}
	})

	// The NATS servers: one per cluster node, each with its own
	// configuration, the passwords it refers to, and an image recent enough.
	clientPort := map[string]int{}
	t.Run("nats servers", func(t *testing.T) {
		names := cf.natsServices()
		if !slices.Equal(names, clusterNodes) {
			t.Fatalf("NATS services %v, want %v", names, clusterNodes)
		}
		for _, name := range names {
			s := cf.services[name]
			// The lease bucket keeps expiry markers (LimitMarkerTTL): server 2.11 or later.
			if minor, ok := strings.CutPrefix(s.image, "nats:2."); !ok {
				t.Errorf("%s: image %s, want nats:2.<minor>", name, s.image)
			} else if m, err := strconv.Atoi(strings.SplitN(minor, ".", 2)[0]); err != nil || m < 11 {
				t.Errorf("%s: image %s, want NATS 2.11 or later", name, s.image)
			}
			if len(s.command) != 2 || s.command[0] != "-c" {
				t.Errorf("%s: command %q, want [\"-c\", <config>]", name, s.command)
				continue
			}
			conf := s.hostPath(s.command[1])
			if conf == "" || !strings.HasPrefix(conf, "deploy/") {
				t.Errorf("%s: config %s is not mounted from ./deploy", name, s.command[1])
				continue
			}
			o := loadNATS(t, strings.TrimPrefix(conf, "deploy/"))
			if o.ServerName != name {
				t.Errorf("%s: runs server %q, want the service name", name, o.ServerName)
			}
			clientPort[name] = o.Port
			var hosts []string
			for _, r := range o.Routes {
				hosts = append(hosts, r.Hostname())
				if r.Port() != strconv.Itoa(o.Cluster.Port) {
					t.Errorf("%s: route %s: port is not the cluster port %d", name, r, o.Cluster.Port)
				}
			}
			slices.Sort(hosts)
			if !slices.Equal(hosts, names) {
				t.Errorf("%s: routes to %v, want the NATS services %v", name, hosts, names)
			}
			for _, v := range configVars(t, filepath.Join(root, filepath.Dir(filepath.FromSlash(conf)))) {
				m := envRef.FindStringSubmatch(s.env[v])
				if m == nil || m[1] != v {
					t.Errorf("%s: environment %s = %q, want \"${%s...}\" (the configuration reads it)", name, v, s.env[v], v)
				}
			}
		}
	})

	t.Run("flags", func(t *testing.T) {
		if testing.Short() {
			t.Skip("builds cmd/plumb; skipped with -short")
		}
		bin := buildPlumb(t, root)
		specs := map[string]flagSpec{}
		for _, s := range cf.services {
			if !s.isPlumb() {
				continue
			}
			if len(s.command) == 0 {
				t.Errorf("%s: no command", s.name)
				continue
			}
			sub := s.command[0]
			spec, ok := specs[sub]
			if !ok {
				spec = helpFlags(t, bin, sub)
				specs[sub] = spec
			}
			for _, p := range checkArgs(s.command[1:], spec) {
				t.Errorf("%s: plumb %s: %s", s.name, sub, p)
			}
		}
	})

	t.Run("connections", func(t *testing.T) {
		if len(clientPort) == 0 {
			t.Skip("no NATS servers read")
		}
		role := map[string]string{"run": "worker", "replay": "producer", "tail": "bot"}
		for _, s := range cf.services {
			if !s.isPlumb() || len(s.command) == 0 {
				continue
			}
			fv := flagValues(s.command[1:])
			urls := strings.Split(fv["nats"], ",")
			if fv["nats"] == "" {
				t.Errorf("%s: no --nats: it would not use the cluster", s.name)
			}
			deps := cf.dependsOn(s.name)
			for _, u := range urls {
				pu, err := url.Parse(u)
				if err != nil || pu.Scheme != "nats" {
					t.Errorf("%s: --nats %q: want nats://<service>:<port>", s.name, u)
					continue
				}
				port, ok := clientPort[pu.Hostname()]
				if !ok {
					t.Errorf("%s: --nats %s: %s is not a NATS service", s.name, u, pu.Hostname())
				} else if pu.Port() != strconv.Itoa(port) {
					t.Errorf("%s: --nats %s: the server listens on %d", s.name, u, port)
				}
				if !deps[pu.Hostname()] {
					t.Errorf("%s: does not depend on %s", s.name, pu.Hostname())
				}
			}
			want := role[s.command[0]]
			if user := fv["user"]; user != want {
				t.Errorf("%s: plumb %s connects as %q, want user %q", s.name, s.command[0], user, want)
				continue
			}
			m := envRef.FindStringSubmatch(s.env["PLUMB_NATS_PASSWORD"])
			if m == nil || m[1] != passwordVars[want] {
				t.Errorf("%s: PLUMB_NATS_PASSWORD = %q, want \"${%s...}\", the variable the servers read user %s's password from",
					s.name, s.env["PLUMB_NATS_PASSWORD"], passwordVars[want], want)
			}
		}
	})

	// Workers share the partitions: same layout flags, distinct names, and
	// a metrics endpoint Prometheus scrapes.
	targets := map[string]bool{}
	t.Run("workers", func(t *testing.T) {
		ws := cf.workers()
		if len(ws) < 2 {
			t.Fatalf("%d workers, want at least 2", len(ws))
		}
		ids := map[string]bool{}
		first := flagValues(ws[0].command[1:])
		for _, s := range ws {
			fv := flagValues(s.command[1:])
			if _, ok := fv["durable"]; !ok {
				t.Errorf("%s: no --durable", s.name)
			}
			id := fv["worker-id"]
			if id == "" || ids[id] {
				t.Errorf("%s: --worker-id %q: want a name of its own", s.name, id)
			}
			ids[id] = true
			for _, f := range []string{"partitions", "replicas", "sites"} {
				if fv[f] != first[f] {
					t.Errorf("%s: --%s %q, %s has %q: workers must agree", s.name, f, fv[f], ws[0].name, first[f])
				}
			}
			if r, err := strconv.Atoi(fv["replicas"]); fv["replicas"] != "" && (err != nil || r > len(clusterNodes)) {
				t.Errorf("%s: --replicas %s: more than the %d servers", s.name, fv["replicas"], len(clusterNodes))
			}
			if sites := s.hostPath(fv["sites"]); sites == "" {
				t.Errorf("%s: --sites %s is not mounted", s.name, fv["sites"])
			} else if _, err := os.Stat(filepath.Join(root, filepath.FromSlash(sites))); err != nil {
				t.Errorf("%s: --sites: %v", s.name, err)
			}
			host, port, err := net.SplitHostPort(fv["metrics"])
			if err != nil || port == "0" {
				t.Errorf("%s: --metrics %q: want host:port", s.name, fv["metrics"])
				continue
			}
			if host != "0.0.0.0" && host != "" {
				t.Errorf("%s: --metrics on %s: Prometheus, in another container, cannot reach it", s.name, host)
			}
			targets[net.JoinHostPort(s.name, port)] = true
			published := false
			for _, p := range s.ports {
				published = published || p.container == port
			}
			if !published {
				t.Errorf("%s: metrics port %s is not published", s.name, port)
			}
		}
	})

	t.Run("prometheus", func(t *testing.T) {
		p, ok := cf.services["prometheus"]
		if !ok {
			t.Fatal("no prometheus service")
		}
		if p.mountOf("./deploy/prometheus.yml") != "/etc/prometheus/prometheus.yml" {
			t.Errorf("prometheus: deploy/prometheus.yml is not mounted at /etc/prometheus/prometheus.yml")
		}
		got := prometheusTargets(t, filepath.Join(root, "deploy", "prometheus.yml"), "plumb")
		if !maps.Equal(got, targets) {
			t.Errorf("prometheus job plumb scrapes %v, the workers' --metrics endpoints are %v",
				slices.Sorted(maps.Keys(got)), slices.Sorted(maps.Keys(targets)))
		}
	})

	t.Run("grafana", func(t *testing.T) {
		g, ok := cf.services["grafana"]
		if !ok {
			t.Fatal("no grafana service")
		}
		if g.mountOf("./deploy/grafana/provisioning") != "/etc/grafana/provisioning" {
			t.Error("grafana: deploy/grafana/provisioning is not mounted at /etc/grafana/provisioning")
		}
		dashDir := g.mountOf("./deploy/grafana/dashboards")
		prov := filepath.Join(root, "deploy", "grafana", "provisioning")

		doc := readYAML(t, filepath.Join(prov, "datasources", "prometheus.yml"))
		var uids []string
		for i, d := range yamlList(t, yamlMap(t, doc, "datasources file")["datasources"], "datasources") {
			ds := yamlMap(t, d, fmt.Sprintf("datasources[%d]", i))
			u, err := url.Parse(yamlString(t, ds["url"], "datasource url"))
			if err != nil {
				t.Fatal(err)
			}
			if _, ok := cf.services[u.Hostname()]; !ok || yamlString(t, ds["type"], "type") != "prometheus" {
				t.Errorf("datasource %s: want a prometheus data source at a compose service", u)
			}
			uids = append(uids, yamlString(t, ds["uid"], "datasource uid"))
		}

		doc = readYAML(t, filepath.Join(prov, "dashboards", "plumb.yml"))
		for i, p := range yamlList(t, yamlMap(t, doc, "dashboards file")["providers"], "providers") {
			pm := yamlMap(t, p, fmt.Sprintf("providers[%d]", i))
			dir := yamlString(t, yamlMap(t, pm["options"], "options")["path"], "options.path")
			if dir != dashDir {
				t.Errorf("dashboard provider reads %s, deploy/grafana/dashboards is mounted at %q", dir, dashDir)
			}
		}
		for _, uid := range dashboardUIDs(t, loadDashboard(t)) {
			if !slices.Contains(uids, uid) {
				t.Errorf("the dashboard uses data source %q, provisioned are %v", uid, uids)
			}
		}
	})
}

// dependsOn returns the services name depends on, directly or not.
func (cf *composeFile) dependsOn(name string) map[string]bool {
	seen := map[string]bool{}
	var walk func(string)
	walk = func(n string) {
		s, ok := cf.services[n]
		if !ok {
			return
		}
		for _, d := range s.dependsOn {
			if !seen[d] {
				seen[d] = true
				walk(d)
			}
		}
	}
	walk(name)
	return seen
}

func readYAML(t *testing.T, file string) any {
	t.Helper()
	data, err := os.ReadFile(file)
	if err != nil {
		t.Fatal(err)
	}
	doc, err := parseYAML(string(data))
	if err != nil {
		t.Fatalf("%s: %v", file, err)
	}
	return doc
}

// prometheusTargets returns the static targets of a scrape job.
func prometheusTargets(t *testing.T, file, job string) map[string]bool {
	t.Helper()
	doc := yamlMap(t, readYAML(t, file), file)
	out := map[string]bool{}
	found := false
	for i, sc := range yamlList(t, doc["scrape_configs"], "scrape_configs") {
		m := yamlMap(t, sc, fmt.Sprintf("scrape_configs[%d]", i))
		if yamlString(t, m["job_name"], "job_name") != job {
			continue
		}
		found = true
		for j, st := range yamlList(t, m["static_configs"], "static_configs") {
			for _, tg := range yamlStrings(t, yamlMap(t, st, fmt.Sprintf("static_configs[%d]", j))["targets"], "targets") {
				out[tg] = true
			}
		}
	}
	if !found {
		t.Fatalf("%s: no job %q", file, job)
	}
	return out
}

// buildPlumb builds cmd/plumb into the test's temporary folder, or skips the
// test when it does not build.
func buildPlumb(t *testing.T, root string) string {
	t.Helper()
	goBin, err := exec.LookPath("go")
	if err != nil {
		t.Skipf("no go command to build cmd/plumb with, flags not checked: %v", err)
	}
	bin := filepath.Join(t.TempDir(), "plumb")
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, goBin, "build", "-o", bin, "./cmd/plumb")
	cmd.Dir = root
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Skipf("cmd/plumb does not build, flags not checked: %v\n%s", err, out)
	}
	return bin
}

// flagSpec maps the flags of a plumb subcommand to whether they take a value.
type flagSpec map[string]bool

// helpFlags reads the flags of `plumb <sub> -h` (the flag package's
// PrintDefaults: "  -name type" for a flag with a value, "  -name" for a
// boolean).
func helpFlags(t *testing.T, bin, sub string) flagSpec {
	t.Helper()
	out, err := exec.Command(bin, sub, "-h").CombinedOutput()
	if err != nil {
		t.Fatalf("plumb %s -h: %v (is %q a subcommand?)\n%s", sub, err, sub, out)
	}
	spec := flagSpec{}
	for _, line := range strings.Split(string(out), "\n") {
		rest, ok := strings.CutPrefix(line, "  -")
		if !ok {
			continue
		}
		name, typ, _ := strings.Cut(rest, " ")
		if strings.Contains(name, "\t") { // one-letter flag: usage on the same line
			name, _, _ = strings.Cut(name, "\t")
			typ = ""
		}
		spec[name] = typ != ""
	}
	if len(spec) == 0 {
		t.Fatalf("plumb %s -h lists no flags:\n%s", sub, out)
	}
	return spec
}

// checkArgs returns the problems of a command line after the subcommand:
// unknown flags, missing values, positional arguments.
func checkArgs(args []string, spec flagSpec) []string {
	var probs []string
	for i := 0; i < len(args); i++ {
		name, ok := flagName(args[i])
		if !ok {
			probs = append(probs, fmt.Sprintf("positional argument %q", args[i]))
			continue
		}
		name, _, hasValue := strings.Cut(name, "=")
		takes, known := spec[name]
		switch {
		case !known:
			probs = append(probs, fmt.Sprintf("unknown flag --%s", name))
		case takes && !hasValue:
			if i+1 >= len(args) {
				probs = append(probs, fmt.Sprintf("--%s needs a value", name))
			}
			i++
		}
	}
	return probs
}

func TestCheckArgs(t *testing.T) {
	spec := flagSpec{"nats": true, "durable": false, "speed": true}
	cases := []struct {
		name  string
		args  []string
		probs int
	}{
		{"valid", []string{"--durable", "--nats", "nats://h:4222", "-speed=3"}, 0},
		{"unknown", []string{"--nat", "x"}, 2}, // unknown flag, then a positional
		{"missing value", []string{"--durable", "--nats"}, 1},
		{"positional", []string{"file"}, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := checkArgs(c.args, spec); len(got) != c.probs {
				t.Errorf("checkArgs(%q) = %q, want %d problems", c.args, got, c.probs)
			}
		})
	}
}

// dashboard is the part of a Grafana dashboard the tests read.
type dashboard struct {
	UID    string `json:"uid"`
	Panels []struct {
		Title      string `json:"title"`
		Datasource struct {
			UID string `json:"uid"`
		} `json:"datasource"`
		Targets []struct {
			Expr       string `json:"expr"`
			Datasource struct {
				UID string `json:"uid"`
			} `json:"datasource"`
		} `json:"targets"`
	} `json:"panels"`
}

func loadDashboard(t *testing.T) dashboard {
	t.Helper()
	data, err := os.ReadFile(filepath.Join(sharedtest.Root(t), "deploy", "grafana", "dashboards", "plumb.json"))
	if err != nil {
		t.Fatal(err)
	}
	var d dashboard
	if err := json.Unmarshal(data, &d); err != nil {
		t.Fatalf("plumb.json: %v", err)
	}
	return d
}

func dashboardUIDs(t *testing.T, d dashboard) []string {
	t.Helper()
	var uids []string
	for _, p := range d.Panels {
		uids = append(uids, p.Datasource.UID)
		for _, tg := range p.Targets {
			uids = append(uids, tg.Datasource.UID)
		}
	}
	slices.Sort(uids)
	return slices.Compact(uids)
}

// assumedMetrics are metrics the dashboard shows that plumb does not
// register yet: their absence is logged, not failed.
var assumedMetrics = map[string]string{
	"plumb_partitions_owned": "gauge: input partitions this worker holds a lease on (plumb run --durable)",
	"plumb_live_coverage":    "gauge by label level: share of settled outcomes at or below the published quantile, pooled over the worker's sites and lead buckets",
}

// metricsSources are the packages whose code defines plumb's metrics.
var metricsSources = []string{"worker", "cmd/plumb"}

// definedMetrics returns the metric names given as Name in a prometheus
// options literal (prometheus.CounterOpts{Name: "..."} and the like) in the
// non-test Go files of metricsSources. It reads the source rather than
// calling the constructors so that it does not depend on those packages
// compiling while they are being changed.
func definedMetrics(t *testing.T) map[string]bool {
	t.Helper()
	known := map[string]bool{}
	fset := token.NewFileSet()
	for _, dir := range metricsSources {
		files, err := filepath.Glob(filepath.Join(sharedtest.Root(t), filepath.FromSlash(dir), "*.go"))
		if err != nil {
			t.Fatal(err)
		}
		for _, file := range files {
			if strings.HasSuffix(file, "_test.go") {
				continue
			}
			f, err := parser.ParseFile(fset, file, nil, parser.SkipObjectResolution)
			if err != nil {
				t.Fatalf("metrics source: %v", err)
			}
			ast.Inspect(f, func(n ast.Node) bool {
				lit, ok := n.(*ast.CompositeLit)
				if !ok {
					return true
				}
				sel, ok := lit.Type.(*ast.SelectorExpr)
				if !ok || !strings.HasSuffix(sel.Sel.Name, "Opts") {
					return true
				}
				if pkg, ok := sel.X.(*ast.Ident); !ok || pkg.Name != "prometheus" {
					return true
				}
				for _, e := range lit.Elts {
					kv, ok := e.(*ast.KeyValueExpr)
					if !ok {
						continue
					}
					key, ok := kv.Key.(*ast.Ident)
					val, ok2 := kv.Value.(*ast.BasicLit)
					if ok && ok2 && key.Name == "Name" && val.Kind == token.STRING {
						if name, err := strconv.Unquote(val.Value); err == nil {
							known[name] = true
						}
					}
				}
				return true
			})
		}
	}
	return known
}

// metricName matches the plumb metric names in a PromQL expression.
var metricName = regexp.MustCompile(`\bplumb_[a-z0-9_]+\b`)

// TestDashboardMetrics checks that every panel of the dashboard queries
// metrics plumb defines, or assumedMetrics.
func TestDashboardMetrics(t *testing.T) {
	known := definedMetrics(t)
	for _, want := range []string{"plumb_inputs_total", "plumb_refresh_seconds"} {
		if !known[want] {
			t.Fatalf("read metric names %v from %v, missing %s: the reader is broken", slices.Sorted(maps.Keys(known)), metricsSources, want)
		}
	}
	d := loadDashboard(t)
	if d.UID == "" || len(d.Panels) < 7 {
		t.Fatalf("dashboard uid %q with %d panels, want a uid and the 7 panels", d.UID, len(d.Panels))
	}
	for _, p := range d.Panels {
		if len(p.Targets) == 0 {
			t.Errorf("panel %q has no query", p.Title)
		}
		for _, tg := range p.Targets {
			names := metricName.FindAllString(tg.Expr, -1)
			if len(names) == 0 {
				t.Errorf("panel %q: %q queries no plumb metric", p.Title, tg.Expr)
			}
			for _, n := range names {
				base := n
				for _, suf := range []string{"_bucket", "_sum", "_count"} {
					if b, ok := strings.CutSuffix(n, suf); ok && known[b] {
						base = b
					}
				}
				switch {
				case known[base]:
				case assumedMetrics[base] != "":
					t.Logf("panel %q: %s is not defined yet (%s)", p.Title, base, assumedMetrics[base])
				default:
					t.Errorf("panel %q: no metric %s (defined: %v)", p.Title, n, slices.Sorted(maps.Keys(known)))
				}
			}
		}
	}
}
