// Package deploy holds the container and Kubernetes material; this test
// renders the kustomize overlays and checks them against the official
// Kubernetes types. Its heavy modules are test-only: the service binary
// does not import this package.
package deploy

import (
	"bytes"
	"encoding/json"
	"fmt"
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
	"k8s.io/apimachinery/pkg/labels"
	"sigs.k8s.io/kustomize/api/krusty"
	"sigs.k8s.io/kustomize/kyaml/filesys"
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

func render(t *testing.T, overlay string) rendered {
	t.Helper()
	k := krusty.MakeKustomizer(krusty.MakeDefaultOptions())
	m, err := k.Run(filesys.MakeFsOnDisk(), filepath.Join("k8s", "overlays", overlay))
	if err != nil {
		t.Fatalf("kustomize %s: %v", overlay, err)
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
			t.Fatalf("%s renders an unexpected %s", overlay, kind)
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
