// Package deploy holds the container and Kubernetes material; this test
// renders the kustomize overlays and checks them against the official
// Kubernetes types. Its heavy modules are test-only: the service binary
// does not import this package.
package deploy

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net"
	"net/netip"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	appsv1 "k8s.io/api/apps/v1"
	autoscalingv2 "k8s.io/api/autoscaling/v2"
	corev1 "k8s.io/api/core/v1"
	networkingv1 "k8s.io/api/networking/v1"
	policyv1 "k8s.io/api/policy/v1"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"k8s.io/apimachinery/pkg/labels"
	"k8s.io/apimachinery/pkg/util/intstr"
	"sigs.k8s.io/kustomize/api/krusty"
	"sigs.k8s.io/kustomize/kyaml/filesys"
	"sigs.k8s.io/kustomize/kyaml/yaml"
)

// rendered is one overlay's objects, decoded strictly into their types.
type rendered struct {
	deployments []appsv1.Deployment
	services    []corev1.Service
	configMaps  []corev1.ConfigMap
	pvcs        []corev1.PersistentVolumeClaim
	pdbs        []policyv1.PodDisruptionBudget
	hpas        []autoscalingv2.HorizontalPodAutoscaler
	netpols     []networkingv1.NetworkPolicy
}

// strict decodes JSON into v, refusing fields the type does not have.
func strict(t *testing.T, kind string, data []byte, v any) {
	t.Helper()
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		t.Fatalf("%s does not decode strictly into its Kubernetes type: %v", kind, err)
	}
}

// render builds one overlay (a directory under k8s/overlays).
func render(t *testing.T, overlay string) rendered {
	t.Helper()
	return renderDir(t, filepath.Join("k8s", "overlays", overlay))
}

// renderDir builds the kustomization in dir.
func renderDir(t *testing.T, dir string) rendered {
	t.Helper()
	k := krusty.MakeKustomizer(krusty.MakeDefaultOptions())
	m, err := k.Run(filesys.MakeFsOnDisk(), dir)
	if err != nil {
		t.Fatalf("kustomize %s: %v", dir, err)
	}
	var r rendered
	for _, res := range m.Resources() {
		data, err := res.MarshalJSON()
		if err != nil {
			t.Fatal(err)
		}
		switch kind := res.GetKind(); kind {
		case "Deployment":
			var d appsv1.Deployment
			strict(t, kind, data, &d)
			r.deployments = append(r.deployments, d)
		case "Service":
			var s corev1.Service
			strict(t, kind, data, &s)
			r.services = append(r.services, s)
		case "ConfigMap":
			var c corev1.ConfigMap
			strict(t, kind, data, &c)
			r.configMaps = append(r.configMaps, c)
		case "PersistentVolumeClaim":
			var p corev1.PersistentVolumeClaim
			strict(t, kind, data, &p)
			r.pvcs = append(r.pvcs, p)
		case "PodDisruptionBudget":
			var p policyv1.PodDisruptionBudget
			strict(t, kind, data, &p)
			r.pdbs = append(r.pdbs, p)
		case "HorizontalPodAutoscaler":
			var h autoscalingv2.HorizontalPodAutoscaler
			strict(t, kind, data, &h)
			r.hpas = append(r.hpas, h)
		case "NetworkPolicy":
			var n networkingv1.NetworkPolicy
			strict(t, kind, data, &n)
			r.netpols = append(r.netpols, n)
		default:
			t.Fatalf("%s renders an unexpected %s", dir, kind)
		}
	}
	return r
}

// probePaths are the endpoints halite serves for probes (hooks/server.go).
var probePaths = map[string]bool{"/healthz": true, "/readyz": true}

func TestOverlays(t *testing.T) {
	for _, tc := range []struct {
		overlay     string
		replicas    int32
		wantHPA     bool
		wantPVC     bool
		dsnFromEnv  bool
		egressPorts []int32
	}{
		{"single-node", 1, false, true, false, []int32{443, 53}},
		{"production", 3, true, false, true, []int32{443, 53, 5432, 4318}},
	} {
		t.Run(tc.overlay, func(t *testing.T) {
			r := render(t, tc.overlay)
			if len(r.deployments) != 1 || len(r.services) != 1 || len(r.configMaps) != 1 || len(r.netpols) != 1 || len(r.pdbs) != 1 {
				t.Fatalf("objects: %d deployments, %d services, %d configmaps, %d netpols, %d pdbs", len(r.deployments),
					len(r.services), len(r.configMaps), len(r.netpols), len(r.pdbs))
			}
			d := r.deployments[0]
			if *d.Spec.Replicas != tc.replicas {
				t.Errorf("replicas %d, want %d", *d.Spec.Replicas, tc.replicas)
			}
			sel, err := metav1LabelSelector(d)
			if err != nil || !sel.Matches(labels.Set(d.Spec.Template.Labels)) {
				t.Errorf("the Deployment's selector does not match its pod labels: %v", err)
			}
			if !labels.SelectorFromSet(r.services[0].Spec.Selector).Matches(labels.Set(d.Spec.Template.Labels)) {
				t.Error("the Service does not select the pods")
			}
			pod := d.Spec.Template.Spec
			if pod.SecurityContext == nil || pod.SecurityContext.RunAsNonRoot == nil || !*pod.SecurityContext.RunAsNonRoot {
				t.Error("pods must run as non-root")
			}
			if len(pod.Containers) != 1 {
				t.Fatalf("%d containers", len(pod.Containers))
			}
			c := pod.Containers[0]
			sc := c.SecurityContext
			if sc == nil || sc.ReadOnlyRootFilesystem == nil || !*sc.ReadOnlyRootFilesystem || sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation {
				t.Error("the container needs a read-only root filesystem and no privilege escalation")
			}
			for name, p := range map[string]*corev1.Probe{"startup": c.StartupProbe, "liveness": c.LivenessProbe, "readiness": c.ReadinessProbe} {
				if p == nil || p.HTTPGet == nil || !probePaths[p.HTTPGet.Path] {
					t.Errorf("%s probe missing or on a path halite does not serve", name)
				}
			}
			if c.Resources.Limits.Memory().IsZero() || c.Resources.Requests.Cpu().IsZero() {
				t.Error("resource requests and limits are needed")
			}
			var dsn, memLimit *corev1.EnvVar
			for i := range c.Env {
				switch c.Env[i].Name {
				case "HALITE_STORE_DSN":
					dsn = &c.Env[i]
				case "GOMEMLIMIT":
					memLimit = &c.Env[i]
				}
			}
			// The Go runtime's soft limit must sit below the container's
			// hard one, or the kernel kills the pod before the GC tightens.
			if memLimit == nil {
				t.Error("GOMEMLIMIT is not set")
			} else if n, ok := goMemLimit(memLimit.Value); !ok || n >= c.Resources.Limits.Memory().Value() {
				t.Errorf("GOMEMLIMIT %q (valid: %v) is not below the memory limit %s", memLimit.Value, ok, c.Resources.Limits.Memory())
			}
			if dsn == nil || (dsn.ValueFrom != nil) != tc.dsnFromEnv || (!tc.dsnFromEnv && !strings.HasPrefix(dsn.Value, "sqlite:")) {
				t.Errorf("store DSN %+v", dsn)
			}
			if (len(r.hpas) == 1) != tc.wantHPA || (len(r.pvcs) == 1) != tc.wantPVC {
				t.Errorf("%d HPAs, %d PVCs", len(r.hpas), len(r.pvcs))
			}
			np := r.netpols[0]
			if len(np.Spec.PolicyTypes) != 2 || len(np.Spec.Ingress) == 0 {
				t.Error("the NetworkPolicy must restrict ingress and egress")
			}
			var ports []int32
			for _, e := range np.Spec.Egress {
				for _, p := range e.Ports {
					if !slices.Contains(ports, p.Port.IntVal) {
						ports = append(ports, p.Port.IntVal)
					}
				}
			}
			if fmt.Sprint(ports) != fmt.Sprint(tc.egressPorts) {
				t.Errorf("egress ports %v, want %v", ports, tc.egressPorts)
			}
			if tc.replicas > 1 && (r.pdbs[0].Spec.MinAvailable == nil || r.pdbs[0].Spec.MinAvailable.IntValue() < 1) {
				t.Error("several replicas need a PodDisruptionBudget keeping one available")
			}
			if tc.replicas > 1 && len(pod.TopologySpreadConstraints) == 0 {
				t.Error("replicas must be spread across nodes")
			}
			if tc.replicas == 1 && d.Spec.Strategy.Type != appsv1.RecreateDeploymentStrategyType {
				t.Error("a single SQLite replica must be replaced with Recreate, never two pods on one file")
			}
		})
	}
}

// TestDockerfilePolicy is the Dockerfile's lint step (Docker cannot run
// here): a multi-stage build of a static binary, a final image without a
// shell, a non-root numeric user, a health check through the binary in
// exec form, version and ruleset labels, and no ADD or unpinned bases.
func TestDockerfilePolicy(t *testing.T) {
	data, err := os.ReadFile("Dockerfile")
	if err != nil {
		t.Fatal(err)
	}
	var froms, final []string
	for _, line := range strings.Split(string(data), "\n") {
		line = strings.TrimSpace(line)
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		instr := strings.ToUpper(strings.Fields(line)[0])
		if instr == "FROM" {
			froms = append(froms, line)
			final = nil
		}
		final = append(final, line)
		if instr == "ADD" {
			t.Errorf("ADD is not used (fetches and unpacks implicitly): %s", line)
		}
	}
	if len(froms) < 2 {
		t.Fatalf("want a multi-stage build, got %d stages", len(froms))
	}
	for _, f := range froms {
		if strings.Contains(f, ":latest") || !strings.Contains(strings.Fields(f)[1], ":") {
			t.Errorf("base image not pinned: %s", f)
		}
	}
	body := string(data)
	for _, want := range []string{"CGO_ENABLED=0", "go build"} {
		if !strings.Contains(body, want) {
			t.Errorf("build stage lacks %q", want)
		}
	}
	last := strings.Join(final, "\n")
	base := strings.Fields(froms[len(froms)-1])[1]
	if !strings.Contains(base, "distroless/static") && base != "scratch" {
		t.Errorf("final image %s may have a shell", base)
	}
	for _, want := range []string{"USER 65532:65532", `HEALTHCHECK CMD ["/usr/local/bin/halite", "healthcheck"]`,
		"org.opencontainers.image.version", "io.halite.ruleset", `ENTRYPOINT ["/usr/local/bin/halite"]`} {
		if !strings.Contains(last, want) {
			t.Errorf("final stage lacks %s", want)
		}
	}
	if strings.Contains(last, "RUN ") {
		t.Error("the final stage must not RUN anything (it has no shell)")
	}
}

// goMemLimit reads a GOMEMLIMIT value as the Go runtime does (package
// runtime, "Environment Variables": a byte count with an optional unit
// suffix B, KiB, MiB, GiB or TiB); "100Mi" or "100MB", which Kubernetes
// would take, stop the runtime at start-up, so they are not valid here.
func goMemLimit(v string) (int64, bool) {
	m := regexp.MustCompile(`^([0-9]+)(B|KiB|MiB|GiB|TiB)?$`).FindStringSubmatch(v)
	if m == nil {
		return 0, false
	}
	n, err := strconv.ParseInt(m[1], 10, 64)
	if err != nil {
		return 0, false
	}
	shift := map[string]uint{"": 0, "B": 0, "KiB": 10, "MiB": 20, "GiB": 30, "TiB": 40}[m[2]]
	return n << shift, true
}

func TestGoMemLimit(t *testing.T) {
	for v, want := range map[string]int64{"100MiB": 100 << 20, "1024": 1024, "2GiB": 2 << 30, "100Mi": -1, "100MB": -1, "100M": -1, "": -1} {
		n, ok := goMemLimit(v)
		if (want < 0 && ok) || (want >= 0 && (!ok || n != want)) {
			t.Errorf("goMemLimit(%q) = %d, %v; want %d", v, n, ok, want)
		}
	}
}

// kustomizations lists the base and every overlay, so a new overlay is
// checked without being named here.
func kustomizations(t *testing.T) []string {
	t.Helper()
	dirs := []string{filepath.Join("k8s", "base")}
	entries, err := os.ReadDir(filepath.Join("k8s", "overlays"))
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range entries {
		if e.IsDir() {
			dirs = append(dirs, filepath.Join("k8s", "overlays", e.Name()))
		}
	}
	return dirs
}

// TestAutoscalerKeepsReplicas: where an autoscaler is rendered, it scales
// the Deployment, its floor is the Deployment's replica count (a lower
// minReplicas takes pods away at the first quiet spell, a higher one adds
// them at once) and its ceiling is not below its floor; a
// PodDisruptionBudget's minAvailable stays below the floor, or no node
// could ever be drained.
func TestAutoscalerKeepsReplicas(t *testing.T) {
	for _, dir := range kustomizations(t) {
		t.Run(dir, func(t *testing.T) {
			r := renderDir(t, dir)
			if len(r.deployments) != 1 {
				t.Fatalf("%d Deployments", len(r.deployments))
			}
			d := r.deployments[0]
			replicas := int32(1) // the API's default
			if d.Spec.Replicas != nil {
				replicas = *d.Spec.Replicas
			}
			for _, h := range r.hpas {
				ref := h.Spec.ScaleTargetRef
				if ref.Kind != "Deployment" || ref.Name != d.Name || ref.APIVersion != "apps/v1" {
					t.Errorf("HorizontalPodAutoscaler %s scales %s %s (%s), not the Deployment %s", h.Name, ref.Kind, ref.Name, ref.APIVersion, d.Name)
				}
				min := int32(1)
				if h.Spec.MinReplicas != nil {
					min = *h.Spec.MinReplicas
				}
				if min != replicas {
					t.Errorf("HorizontalPodAutoscaler %s minReplicas %d, but the Deployment asks for %d replicas: patch one to the other", h.Name, min, replicas)
				}
				if h.Spec.MaxReplicas < min {
					t.Errorf("HorizontalPodAutoscaler %s maxReplicas %d is below minReplicas %d", h.Name, h.Spec.MaxReplicas, min)
				}
			}
			for _, p := range r.pdbs {
				if m := p.Spec.MinAvailable; m != nil && m.Type == intstr.Int && replicas > 1 && m.IntVal >= replicas {
					t.Errorf("PodDisruptionBudget %s keeps %d of %d pods: no pod could be evicted", p.Name, m.IntVal, replicas)
				}
			}
		})
	}
}

// haliteConfig is the part of halite's configuration these tests read.
// cmd/halite loads the same file strictly through the real loader
// (TestKubernetesConfigIsValid); TestConfigFitsDeployment keeps every
// overlay on that file.
type haliteConfig struct {
	ListenAddr     string `yaml:"listen_addr"`
	AdminAddr      string `yaml:"admin_listen_addr"`
	PolicyOverride string `yaml:"policy_override"`
	LabCodes       string `yaml:"lab_codes"`
	Store          struct {
		HashKeyFile string `yaml:"hash_key_file"`
	} `yaml:"store"`
	Issuers []issuerConfig `yaml:"issuers"`
}

type issuerConfig struct {
	Iss         string             `yaml:"iss"`
	JWKSURL     string             `yaml:"jwks_url"`
	JWKSFile    string             `yaml:"jwks_file"`
	FHIRServers []fhirServerConfig `yaml:"fhir_servers"`
}

type fhirServerConfig struct {
	BaseURL      string `yaml:"base_url"`
	AllowPrivate bool   `yaml:"allow_private"`
}

// mountedConfig follows the container's --config argument through its
// volume mount to the rendered ConfigMap and returns the file's text.
func mountedConfig(t *testing.T, r rendered) (string, haliteConfig) {
	t.Helper()
	pod := r.deployments[0].Spec.Template.Spec
	c := pod.Containers[0]
	path := ""
	for i, a := range c.Args {
		if a == "--config" && i+1 < len(c.Args) {
			path = c.Args[i+1]
		}
	}
	if path == "" {
		t.Fatalf("the container has no --config argument: %v", c.Args)
	}
	vol, key, ok := mountOf(pod, c, path)
	if !ok || vol.ConfigMap == nil {
		t.Fatalf("--config %s is not mounted from a ConfigMap", path)
	}
	for _, cm := range r.configMaps {
		if cm.Name == vol.ConfigMap.Name {
			text, ok := cm.Data[key]
			if !ok {
				t.Fatalf("ConfigMap %s has no key %s", cm.Name, key)
			}
			var cfg haliteConfig
			if err := yaml.Unmarshal([]byte(text), &cfg); err != nil {
				t.Fatalf("ConfigMap %s, %s: %v", cm.Name, key, err)
			}
			return text, cfg
		}
	}
	t.Fatalf("the ConfigMap %s mounted for --config is not rendered", vol.ConfigMap.Name)
	return "", haliteConfig{}
}

// mountOf finds the volume that provides path in container c and the key
// (ConfigMap or Secret item) it is read from; ok is false when no mount
// covers path or the volume's items leave it out.
func mountOf(pod corev1.PodSpec, c corev1.Container, path string) (corev1.Volume, string, bool) {
	for _, m := range c.VolumeMounts {
		var rel string
		switch {
		case m.MountPath == path && m.SubPath != "":
			rel = m.SubPath
		case strings.HasPrefix(path, strings.TrimSuffix(m.MountPath, "/")+"/"):
			rel = filepath.Join(m.SubPath, strings.TrimPrefix(path, strings.TrimSuffix(m.MountPath, "/")+"/"))
		default:
			continue
		}
		for _, v := range pod.Volumes {
			if v.Name != m.Name {
				continue
			}
			var items []corev1.KeyToPath
			switch {
			case v.ConfigMap != nil:
				items = v.ConfigMap.Items
			case v.Secret != nil:
				items = v.Secret.Items
			default:
				return v, rel, true
			}
			if len(items) == 0 {
				return v, rel, true
			}
			for _, it := range items {
				if it.Path == rel {
					return v, it.Key, true
				}
			}
			return v, "", false
		}
	}
	return corev1.Volume{}, "", false
}

// TestConfigFitsDeployment: in every overlay the Deployment mounts
// k8s/base/halite.yaml unchanged (so cmd/halite's real-loader test of that
// file covers what runs; an overlay with its own configuration must add
// it there), the files it names are mounted, and its ports are the
// container's.
func TestConfigFitsDeployment(t *testing.T) {
	base, err := os.ReadFile(filepath.Join("k8s", "base", "halite.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	for _, dir := range kustomizations(t) {
		t.Run(dir, func(t *testing.T) {
			r := renderDir(t, dir)
			text, cfg := mountedConfig(t, r)
			if text != string(base) {
				t.Error("the mounted halite.yaml differs from k8s/base/halite.yaml, which is the one cmd/halite's " +
					"TestKubernetesConfigIsValid loads; check this overlay's configuration there too")
			}
			pod := r.deployments[0].Spec.Template.Spec
			c := pod.Containers[0]
			files := map[string]string{"store.hash_key_file": cfg.Store.HashKeyFile, "policy_override": cfg.PolicyOverride, "lab_codes": cfg.LabCodes}
			for i, is := range cfg.Issuers {
				files[fmt.Sprintf("issuers[%d].jwks_file", i)] = is.JWKSFile
			}
			for key, path := range files {
				if _, _, ok := mountOf(pod, c, path); path != "" && !ok {
					t.Errorf("%s %s is not mounted into the container", key, path)
				}
			}
			ports := map[string]int32{}
			for _, p := range c.Ports {
				ports[p.Name] = p.ContainerPort
			}
			for key, want := range map[string]string{cfg.ListenAddr: "http", cfg.AdminAddr: "metrics"} {
				if key == "" {
					continue
				}
				_, port, err := net.SplitHostPort(key)
				if n, _ := strconv.Atoi(port); err != nil || int32(n) != ports[want] {
					t.Errorf("halite listens on %s, but the container's %s port is %d", key, want, ports[want])
				}
			}
		})
	}
}

// privateRanges are the ranges net.IP.IsPrivate names, which halite's dial
// guard (fhirclient.NewTransport) refuses unless a fhir_servers entry says
// allow_private.
var privateRanges = []netip.Prefix{
	netip.MustParsePrefix("10.0.0.0/8"), netip.MustParsePrefix("172.16.0.0/12"),
	netip.MustParsePrefix("192.168.0.0/16"), netip.MustParsePrefix("fc00::/7"),
}

// egress is where a pod may open connections to one port: anywhere (a rule
// without "to", or no policy restricting its egress), in-cluster pods
// (namespace or pod selectors), and IP blocks.
type egress struct {
	any, pods bool
	blocks    []networkingv1.IPBlock
}

func (e egress) none() bool { return !e.any && !e.pods && len(e.blocks) == 0 }

// egressTo collects the egress the NetworkPolicies selecting pod allow to
// proto/port. Policies add up; a named port names a port of a destination
// pod, never of an address outside the cluster, so it is not counted.
func egressTo(nps []networkingv1.NetworkPolicy, pod labels.Set, proto corev1.Protocol, port int32) egress {
	var e egress
	restricted := false
	for _, np := range nps {
		sel, err := metav1.LabelSelectorAsSelector(&np.Spec.PodSelector)
		if err != nil || !sel.Matches(pod) {
			continue
		}
		types := np.Spec.PolicyTypes
		if len(types) == 0 && len(np.Spec.Egress) > 0 {
			types = []networkingv1.PolicyType{networkingv1.PolicyTypeEgress}
		}
		if !slices.Contains(types, networkingv1.PolicyTypeEgress) {
			continue
		}
		restricted = true
		for _, rule := range np.Spec.Egress {
			if !allowsPort(rule.Ports, proto, port) {
				continue
			}
			if len(rule.To) == 0 {
				e.any = true
			}
			for _, peer := range rule.To {
				if peer.IPBlock != nil {
					e.blocks = append(e.blocks, *peer.IPBlock)
				} else {
					e.pods = true
				}
			}
		}
	}
	if !restricted {
		e.any = true
	}
	return e
}

func allowsPort(ports []networkingv1.NetworkPolicyPort, proto corev1.Protocol, port int32) bool {
	if len(ports) == 0 {
		return true
	}
	for _, p := range ports {
		pr := corev1.ProtocolTCP
		if p.Protocol != nil {
			pr = *p.Protocol
		}
		if pr != proto {
			continue
		}
		if p.Port == nil {
			return true
		}
		if p.Port.Type != intstr.Int {
			continue
		}
		hi := p.Port.IntVal
		if p.EndPort != nil {
			hi = *p.EndPort
		}
		if port >= p.Port.IntVal && port <= hi {
			return true
		}
	}
	return false
}

// blockKind says whether an IP block lets through private addresses, public
// ones, or both (a public range whose except leaves out every private
// range it spans is public only).
func blockKind(b networkingv1.IPBlock) (private, public bool, err error) {
	p, err := netip.ParsePrefix(b.CIDR)
	if err != nil {
		return false, false, err
	}
	p = p.Masked()
	var except []netip.Prefix
	for _, x := range b.Except {
		xp, err := netip.ParsePrefix(x)
		if err != nil {
			return false, false, err
		}
		except = append(except, xp.Masked())
	}
	for _, r := range privateRanges {
		if r.Bits() <= p.Bits() && r.Contains(p.Addr()) {
			return true, false, nil
		}
	}
	for _, r := range privateRanges {
		if !p.Overlaps(r) {
			continue
		}
		covered := slices.ContainsFunc(except, func(x netip.Prefix) bool { return x.Bits() <= r.Bits() && x.Contains(r.Addr()) })
		private = private || !covered
	}
	return private, true, nil
}

// inBlocks reports whether ip passes one of the blocks (inside its CIDR,
// outside its except).
func inBlocks(blocks []networkingv1.IPBlock, ip netip.Addr) bool {
	for _, b := range blocks {
		p, err := netip.ParsePrefix(b.CIDR)
		if err != nil || !p.Contains(ip) {
			continue
		}
		if !slices.ContainsFunc(b.Except, func(x string) bool { xp, err := netip.ParsePrefix(x); return err == nil && xp.Contains(ip) }) {
			return true
		}
	}
	return false
}

// fhirEgressProblems checks each fhir_servers entry against the egress the
// NetworkPolicies give the pod. The dial guard refuses private addresses
// unless the entry says allow_private, and the NetworkPolicy drops what it
// does not list, so an entry is coherent when:
//   - the policy lets some address through on the server's port (and DNS
//     for a host name);
//   - every address it lets through there is private (ip blocks in private
//     ranges, or in-cluster pods): allow_private must be true, or every
//     fetch is refused;
//   - every address it lets through there is public: allow_private must be
//     false; true would only widen the guard to addresses the policy drops;
//   - both kinds: either setting is coherent (the server's address decides,
//     which is known only for an IP literal, then checked exactly).
func fhirEgressProblems(cfg haliteConfig, nps []networkingv1.NetworkPolicy, pod labels.Set) []string {
	var out []string
	for i, is := range cfg.Issuers {
		for j, s := range is.FHIRServers {
			key := fmt.Sprintf("issuers[%d].fhir_servers[%d] %s", i, j, s.BaseURL)
			u, err := url.Parse(s.BaseURL)
			if err != nil || u.Hostname() == "" {
				out = append(out, key+": not a URL")
				continue
			}
			port := 443
			if u.Scheme == "http" {
				port = 80
			}
			if u.Port() != "" {
				port, _ = strconv.Atoi(u.Port())
			}
			e := egressTo(nps, pod, corev1.ProtocolTCP, int32(port))
			if e.none() {
				out = append(out, fmt.Sprintf("%s: the NetworkPolicy allows no egress on TCP %d, so every fetch fails", key, port))
				continue
			}
			if ip, err := netip.ParseAddr(u.Hostname()); err == nil {
				if !e.any && !inBlocks(e.blocks, ip) && !(e.pods && ip.IsPrivate()) {
					out = append(out, fmt.Sprintf("%s: the NetworkPolicy does not let %s through on TCP %d", key, ip, port))
				}
				if ip.IsPrivate() != s.AllowPrivate {
					out = append(out, fmt.Sprintf("%s: allow_private is %v for a server whose address is private: %v", key, s.AllowPrivate, ip.IsPrivate()))
				}
				continue
			}
			if egressTo(nps, pod, corev1.ProtocolUDP, 53).none() && egressTo(nps, pod, corev1.ProtocolTCP, 53).none() {
				out = append(out, key+": the NetworkPolicy allows no DNS, so the host name cannot be resolved")
			}
			private, public := e.pods, e.any
			for _, b := range e.blocks {
				pv, pb, err := blockKind(b)
				if err != nil {
					out = append(out, fmt.Sprintf("%s: ipBlock %s: %v", key, b.CIDR, err))
				}
				private, public = private || pv, public || pb
			}
			switch {
			case private && !public && !s.AllowPrivate:
				out = append(out, fmt.Sprintf("%s: the NetworkPolicy lets halite reach only private addresses on TCP %d, "+
					"and halite refuses to dial them without allow_private: true, so every fetch fails", key, port))
			case public && !private && s.AllowPrivate:
				out = append(out, fmt.Sprintf("%s: the NetworkPolicy lets halite reach only public addresses on TCP %d, "+
					"so allow_private: true only widens the dial guard to addresses that cannot be reached; drop it", key, port))
			}
		}
	}
	return out
}

// TestFHIREgressMatchesAllowPrivate: in every overlay, each FHIR server the
// configuration allows can be fetched through both the NetworkPolicy and
// halite's dial guard (fhirEgressProblems).
func TestFHIREgressMatchesAllowPrivate(t *testing.T) {
	for _, dir := range kustomizations(t) {
		t.Run(dir, func(t *testing.T) {
			r := renderDir(t, dir)
			_, cfg := mountedConfig(t, r)
			servers := 0
			for _, is := range cfg.Issuers {
				servers += len(is.FHIRServers)
			}
			if servers == 0 {
				t.Fatal("the configuration allows no FHIR server, so there is nothing to check")
			}
			for _, p := range fhirEgressProblems(cfg, r.netpols, labels.Set(r.deployments[0].Spec.Template.Labels)) {
				t.Error(p)
			}
		})
	}
}

// TestFHIREgressRule tries fhirEgressProblems on policies made up here.
func TestFHIREgressRule(t *testing.T) {
	pod := labels.Set{"app": "halite"}
	tcp, udp := corev1.ProtocolTCP, corev1.ProtocolUDP
	port := func(proto *corev1.Protocol, n int32) networkingv1.NetworkPolicyPort {
		p := intstr.FromInt32(n)
		return networkingv1.NetworkPolicyPort{Protocol: proto, Port: &p}
	}
	dns := networkingv1.NetworkPolicyEgressRule{
		To:    []networkingv1.NetworkPolicyPeer{{NamespaceSelector: &metav1.LabelSelector{}}},
		Ports: []networkingv1.NetworkPolicyPort{port(&udp, 53)},
	}
	to := func(cidr string, except ...string) networkingv1.NetworkPolicyEgressRule {
		return networkingv1.NetworkPolicyEgressRule{
			To:    []networkingv1.NetworkPolicyPeer{{IPBlock: &networkingv1.IPBlock{CIDR: cidr, Except: except}}},
			Ports: []networkingv1.NetworkPolicyPort{port(&tcp, 443)},
		}
	}
	policy := func(rules ...networkingv1.NetworkPolicyEgressRule) []networkingv1.NetworkPolicy {
		return []networkingv1.NetworkPolicy{{Spec: networkingv1.NetworkPolicySpec{
			PodSelector: metav1.LabelSelector{MatchLabels: pod},
			PolicyTypes: []networkingv1.PolicyType{networkingv1.PolicyTypeIngress, networkingv1.PolicyTypeEgress},
			Egress:      rules,
		}}}
	}
	allRFC1918 := []string{"10.0.0.0/8", "172.16.0.0/12", "192.168.0.0/16"}
	for _, tc := range []struct {
		name    string
		base    string
		private bool
		nps     []networkingv1.NetworkPolicy
		ok      bool
	}{
		{"private range, allow_private", "https://fhir.h.example/r4", true, policy(to("10.20.0.0/16"), dns), true},
		{"private range, no allow_private", "https://fhir.h.example/r4", false, policy(to("10.20.0.0/16"), dns), false},
		{"public range, no allow_private", "https://fhir.h.example/r4", false, policy(to("203.0.113.0/24"), dns), true},
		{"public range, allow_private", "https://fhir.h.example/r4", true, policy(to("203.0.113.0/24"), dns), false},
		{"anywhere but private, allow_private", "https://fhir.h.example/r4", true, policy(to("0.0.0.0/0", allRFC1918...), dns), false},
		{"anywhere, either", "https://fhir.h.example/r4", false, policy(to("0.0.0.0/0"), dns), true},
		{"anywhere, either (allow_private)", "https://fhir.h.example/r4", true, policy(to("0.0.0.0/0"), dns), true},
		{"no rule on the port", "https://fhir.h.example:8443/r4", true, policy(to("10.20.0.0/16"), dns), false},
		{"no DNS for a name", "https://fhir.h.example/r4", true, policy(to("10.20.0.0/16")), false},
		{"IP literal inside, private", "https://10.20.1.5/r4", true, policy(to("10.20.0.0/16")), true},
		{"IP literal inside, no allow_private", "https://10.20.1.5/r4", false, policy(to("10.20.0.0/16")), false},
		{"IP literal outside", "https://10.30.1.5/r4", true, policy(to("10.20.0.0/16")), false},
		{"no egress policy", "https://fhir.h.example/r4", false, nil, true},
	} {
		cfg := haliteConfig{Issuers: []issuerConfig{{FHIRServers: []fhirServerConfig{{tc.base, tc.private}}}}}
		if got := fhirEgressProblems(cfg, tc.nps, pod); (len(got) == 0) != tc.ok {
			t.Errorf("%s: problems %q, want ok %v", tc.name, got, tc.ok)
		}
	}
}

// yamlKeys collects the key paths of a YAML document ("store.dsn",
// "issuers[].fhir_servers[].base_url").
func yamlKeys(t *testing.T, name, text string) map[string]bool {
	t.Helper()
	var doc yaml.Node
	if err := yaml.Unmarshal([]byte(text), &doc); err != nil {
		t.Fatalf("%s: %v", name, err)
	}
	keys := map[string]bool{}
	var walk func(n *yaml.Node, prefix string)
	walk = func(n *yaml.Node, prefix string) {
		switch n.Kind {
		case yaml.DocumentNode:
			for _, c := range n.Content {
				walk(c, prefix)
			}
		case yaml.MappingNode:
			for i := 0; i+1 < len(n.Content); i += 2 {
				k := prefix + n.Content[i].Value
				keys[k] = true
				walk(n.Content[i+1], k+".")
			}
		case yaml.SequenceNode:
			for _, c := range n.Content {
				walk(c, strings.TrimSuffix(prefix, ".")+"[].")
			}
		}
	}
	walk(&doc, "")
	return keys
}

// TestExampleDocumentsDeployedKeys: every key the deployed configuration
// sets is documented in halite.example.yaml, as a key or in its commented
// issuers example (cmd/halite's TestExampleConfigIsValid loads the example
// through the real loader).
func TestExampleDocumentsDeployedKeys(t *testing.T) {
	data, err := os.ReadFile("halite.example.yaml")
	if err != nil {
		t.Fatal(err)
	}
	example := yamlKeys(t, "halite.example.yaml", string(data))
	// The commented example: from "# issuers:" to the first line that is
	// not a comment, with "# " taken off.
	var commented []string
	for _, line := range strings.Split(string(data), "\n") {
		if len(commented) == 0 && line != "# issuers:" {
			continue
		}
		if !strings.HasPrefix(line, "#") {
			break
		}
		commented = append(commented, strings.TrimPrefix(strings.TrimPrefix(line, "#"), " "))
	}
	if len(commented) < 2 {
		t.Fatal("halite.example.yaml has no commented issuers example")
	}
	for k := range yamlKeys(t, "the commented issuers example", strings.Join(commented, "\n")) {
		example[k] = true
	}
	for _, dir := range kustomizations(t) {
		r := renderDir(t, dir)
		text, _ := mountedConfig(t, r)
		for k := range yamlKeys(t, dir, text) {
			if !example[k] {
				t.Errorf("%s: key %s is not documented in halite.example.yaml", dir, k)
			}
		}
	}
}
