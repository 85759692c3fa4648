package deploy

import (
	"bytes"
	"fmt"
	"net"
	"net/url"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"testing"

	appsv1 "k8s.io/api/apps/v1"
	corev1 "k8s.io/api/core/v1"
	networkingv1 "k8s.io/api/networking/v1"
	policyv1 "k8s.io/api/policy/v1"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"k8s.io/apimachinery/pkg/labels"
	"k8s.io/apimachinery/pkg/util/intstr"
	"k8s.io/apimachinery/pkg/util/validation"
	"sigs.k8s.io/yaml"
)

// The manifests are decoded with the Kubernetes API's own Go types
// (k8s.io/api v0.37.2) through sigs.k8s.io/yaml v1.6.0's UnmarshalStrict,
// which rejects unknown and duplicate fields: a misspelt or misplaced field,
// which kubectl would drop with only a warning, fails here.

// form is one deployable set of manifests: the embedded store's single
// replica, or replicas sharing PostgreSQL.
type form struct {
	name, dir  string
	replicated bool
}

var (
	embeddedForm   = form{name: "embedded", dir: "kubernetes"}
	replicatedForm = form{name: "replicated", dir: "kubernetes-replicated", replicated: true}
	forms          = []form{embeddedForm, replicatedForm}
)

// eachForm runs check on the manifests of every form.
func eachForm(t *testing.T, check func(t *testing.T, m manifests)) {
	for _, f := range forms {
		t.Run(f.name, func(t *testing.T) { check(t, loadManifests(t, f)) })
	}
}

// secretExample is the one manifest kept out of the kustomization, so that
// applying it never replaces a real Secret with placeholders.
const secretExample = "secret.example.yaml"

// decodeManifest picks the typed object for the document's apiVersion and
// kind and decodes it strictly.
func decodeManifest(doc []byte) (any, error) {
	var tm metav1.TypeMeta
	if err := yaml.Unmarshal(doc, &tm); err != nil {
		return nil, fmt.Errorf("reading apiVersion and kind: %w", err)
	}
	var obj any
	switch tm.APIVersion + " " + tm.Kind {
	case "apps/v1 Deployment":
		obj = &appsv1.Deployment{}
	case "v1 Service":
		obj = &corev1.Service{}
	case "v1 ConfigMap":
		obj = &corev1.ConfigMap{}
	case "v1 Secret":
		obj = &corev1.Secret{}
	case "v1 PersistentVolumeClaim":
		obj = &corev1.PersistentVolumeClaim{}
	case "networking.k8s.io/v1 NetworkPolicy":
		obj = &networkingv1.NetworkPolicy{}
	case "policy/v1 PodDisruptionBudget":
		obj = &policyv1.PodDisruptionBudget{}
	default:
		return nil, fmt.Errorf("no type for apiVersion %q kind %q", tm.APIVersion, tm.Kind)
	}
	if err := yaml.UnmarshalStrict(doc, obj); err != nil {
		return nil, fmt.Errorf("%s: %w", tm.Kind, err)
	}
	return obj, nil
}

// kustomization is the part of kustomize's Kustomization
// (kustomize.config.k8s.io/v1beta1) these manifests use; decoding it
// strictly keeps anything else out until the test learns it.
type kustomization struct {
	APIVersion string   `json:"apiVersion"`
	Kind       string   `json:"kind"`
	Namespace  string   `json:"namespace"`
	Resources  []string `json:"resources"`
}

type manifests struct {
	form       form
	kust       kustomization
	deployment *appsv1.Deployment
	service    *corev1.Service
	configMap  *corev1.ConfigMap
	secret     *corev1.Secret
	pvc        *corev1.PersistentVolumeClaim
	netpol     *networkingv1.NetworkPolicy
	pdb        *policyv1.PodDisruptionBudget
	files      []string // every *.yaml but the kustomization
}

func loadManifests(t *testing.T, f form) manifests {
	t.Helper()
	m := manifests{form: f}
	paths, err := filepath.Glob(filepath.Join(f.dir, "*.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range paths {
		b, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		name := filepath.Base(p)
		if name == "kustomization.yaml" {
			if err := yaml.UnmarshalStrict(b, &m.kust); err != nil {
				t.Fatalf("%s: %v", name, err)
			}
			continue
		}
		m.files = append(m.files, name)
		if bytes.Contains(b, []byte("\n---")) {
			t.Fatalf("%s: one object per file, so the kustomization lists each", name)
		}
		obj, err := decodeManifest(b)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		dup := false
		switch o := obj.(type) {
		case *appsv1.Deployment:
			dup, m.deployment = m.deployment != nil, o
		case *corev1.Service:
			dup, m.service = m.service != nil, o
		case *corev1.ConfigMap:
			dup, m.configMap = m.configMap != nil, o
		case *corev1.Secret:
			dup, m.secret = m.secret != nil, o
			if name != secretExample {
				t.Errorf("%s: a Secret belongs only in %s, with placeholders", name, secretExample)
			}
		case *corev1.PersistentVolumeClaim:
			dup, m.pvc = m.pvc != nil, o
		case *networkingv1.NetworkPolicy:
			dup, m.netpol = m.netpol != nil, o
		case *policyv1.PodDisruptionBudget:
			dup, m.pdb = m.pdb != nil, o
		}
		if dup {
			t.Fatalf("%s: a second %T", name, obj)
		}
	}
	if m.deployment == nil || m.service == nil || m.configMap == nil || m.secret == nil ||
		m.netpol == nil || m.pdb == nil || (m.pvc == nil) != f.replicated {
		t.Fatalf("missing manifests, or a volume claim where the state is in a database: have %v", m.files)
	}
	return m
}

func (m manifests) container(t *testing.T) corev1.Container {
	t.Helper()
	cs := m.deployment.Spec.Template.Spec.Containers
	if len(cs) != 1 {
		t.Fatalf("want one container, got %d", len(cs))
	}
	return cs[0]
}

func (m manifests) podLabels() labels.Set {
	return labels.Set(m.deployment.Spec.Template.Labels)
}

func TestDecodeManifestStrict(t *testing.T) {
	tests := []struct {
		name    string
		doc     string
		wantErr string
	}{
		{name: "valid", doc: "apiVersion: v1\nkind: ConfigMap\nmetadata: {name: x}\ndata: {A: b}\n"},
		{name: "misspelt field", doc: "apiVersion: apps/v1\nkind: Deployment\nmetadata: {name: x}\nspec: {replica: 1}\n", wantErr: "unknown field"},
		{name: "field at the wrong level", doc: "apiVersion: v1\nkind: Service\nmetadata: {name: x}\nports: []\n", wantErr: "unknown field"},
		{name: "duplicate key", doc: "apiVersion: v1\nkind: ConfigMap\nmetadata: {name: x}\ndata: {A: b}\ndata: {A: c}\n", wantErr: "already set"},
		{name: "wrong type", doc: "apiVersion: apps/v1\nkind: Deployment\nmetadata: {name: x}\nspec: {replicas: one}\n", wantErr: "cannot unmarshal"},
		{name: "unknown kind", doc: "apiVersion: v1\nkind: Pod\nmetadata: {name: x}\n", wantErr: "no type"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := decodeManifest([]byte(tc.doc))
			switch {
			case tc.wantErr == "" && err != nil:
				t.Fatalf("unexpected error: %v", err)
			case tc.wantErr != "" && (err == nil || !strings.Contains(err.Error(), tc.wantErr)):
				t.Fatalf("err = %v, want one containing %q", err, tc.wantErr)
			}
		})
	}
}

func TestKustomizationListsEveryManifest(t *testing.T) {
	eachForm(t, testKustomizationListsEveryManifest)
}

func testKustomizationListsEveryManifest(t *testing.T, m manifests) {
	if m.kust.APIVersion != "kustomize.config.k8s.io/v1beta1" || m.kust.Kind != "Kustomization" {
		t.Errorf("kustomization is %s %s", m.kust.APIVersion, m.kust.Kind)
	}
	if errs := validation.IsDNS1123Label(m.kust.Namespace); len(errs) > 0 {
		t.Errorf("namespace %q: %v", m.kust.Namespace, errs)
	}
	listed := map[string]bool{}
	for _, r := range m.kust.Resources {
		if listed[r] {
			t.Errorf("%s listed twice", r)
		}
		listed[r] = true
	}
	for _, f := range m.files {
		switch {
		case f == secretExample && listed[f]:
			t.Errorf("%s is listed: `kubectl apply -k` would overwrite the real Secret with placeholders", f)
		case f != secretExample && !listed[f]:
			t.Errorf("%s is not in kustomization.yaml, so `kubectl apply -k` leaves it out", f)
		}
		delete(listed, f)
	}
	for r := range listed {
		t.Errorf("kustomization.yaml lists %s, which does not exist", r)
	}
}

func TestObjectNamesAndLabels(t *testing.T) { eachForm(t, testObjectNamesAndLabels) }

func testObjectNamesAndLabels(t *testing.T, m manifests) {
	metas := []metav1.ObjectMeta{
		m.deployment.ObjectMeta, m.service.ObjectMeta, m.configMap.ObjectMeta, m.secret.ObjectMeta,
		m.netpol.ObjectMeta, m.pdb.ObjectMeta,
	}
	if m.pvc != nil {
		metas = append(metas, m.pvc.ObjectMeta)
	}
	for _, om := range metas {
		t.Run(om.Name, func(t *testing.T) {
			if errs := validation.IsDNS1123Subdomain(om.Name); len(errs) > 0 {
				t.Errorf("name: %v", errs)
			}
			if om.Namespace != "" {
				t.Errorf("namespace %q set in the object: the kustomization sets it", om.Namespace)
			}
			if om.Labels["app.kubernetes.io/name"] != "deadspace" {
				t.Errorf("labels %v lack app.kubernetes.io/name=deadspace", om.Labels)
			}
			for k, v := range om.Labels {
				if errs := validation.IsQualifiedName(k); len(errs) > 0 {
					t.Errorf("label key %q: %v", k, errs)
				}
				if errs := validation.IsValidLabelValue(v); len(errs) > 0 {
					t.Errorf("label %s value %q: %v", k, v, errs)
				}
			}
		})
	}
	// A Service's name becomes a DNS label (RFC 1035) in the cluster domain.
	if errs := validation.IsDNS1035Label(m.service.Name); len(errs) > 0 {
		t.Errorf("Service name %q: %v", m.service.Name, errs)
	}
}

func TestSingleWriter(t *testing.T) {
	m := loadManifests(t, embeddedForm)
	d := m.deployment.Spec
	if d.Replicas == nil || *d.Replicas != 1 {
		t.Errorf("replicas = %v, want 1: the embedded store has one writer", d.Replicas)
	}
	if d.Strategy.Type != appsv1.RecreateDeploymentStrategyType {
		t.Errorf("strategy %q, want Recreate: a rolling update would start a second writer on the same volume", d.Strategy.Type)
	}
	if len(m.pvc.Spec.AccessModes) != 1 || m.pvc.Spec.AccessModes[0] != corev1.ReadWriteOnce {
		t.Errorf("PVC access modes %v, want [ReadWriteOnce]", m.pvc.Spec.AccessModes)
	}
	if q, ok := m.pvc.Spec.Resources.Requests[corev1.ResourceStorage]; !ok || q.Sign() <= 0 {
		t.Errorf("PVC requests no storage")
	}
	// A PDB with minAvailable: 1 over one replica forbids every eviction,
	// so `kubectl drain` never finishes (Kubernetes documentation,
	// "Specifying a Disruption Budget for your Application").
	p := m.pdb.Spec
	if p.MinAvailable != nil {
		t.Errorf("PDB sets minAvailable %v: with one replica that blocks drains", p.MinAvailable)
	}
	if p.MaxUnavailable == nil || *p.MaxUnavailable != intstr.FromInt32(1) {
		t.Errorf("PDB maxUnavailable = %v, want 1", p.MaxUnavailable)
	}
}

func TestSelectorsMatchThePod(t *testing.T) { eachForm(t, testSelectorsMatchThePod) }

func testSelectorsMatchThePod(t *testing.T, m manifests) {
	pod := m.podLabels()
	sel := func(name string, ls *metav1.LabelSelector) {
		t.Run(name, func(t *testing.T) {
			if ls == nil || (len(ls.MatchLabels) == 0 && len(ls.MatchExpressions) == 0) {
				t.Fatalf("empty selector: it would select every pod in the namespace")
			}
			s, err := metav1.LabelSelectorAsSelector(ls)
			if err != nil {
				t.Fatal(err)
			}
			if !s.Matches(pod) {
				t.Errorf("selector %v does not match the pod's labels %v", s, pod)
			}
		})
	}
	sel("Deployment", m.deployment.Spec.Selector)
	sel("NetworkPolicy", &m.netpol.Spec.PodSelector)
	sel("PodDisruptionBudget", m.pdb.Spec.Selector)
	sel("Service", &metav1.LabelSelector{MatchLabels: m.service.Spec.Selector})
}

func TestSecurityContext(t *testing.T) { eachForm(t, testSecurityContext) }

func testSecurityContext(t *testing.T, m manifests) {
	ps := m.deployment.Spec.Template.Spec
	c := m.container(t)
	df := loadDockerfile(t)
	check := func(name string, ok bool) {
		t.Run(name, func(t *testing.T) {
			if !ok {
				t.Error("not so")
			}
		})
	}
	psc, csc := ps.SecurityContext, c.SecurityContext
	if psc == nil || csc == nil {
		t.Fatal("pod or container securityContext missing")
	}
	check("pod runAsNonRoot", psc.RunAsNonRoot != nil && *psc.RunAsNonRoot)
	check("pod runAsUser is the image's user", psc.RunAsUser != nil && strconv.FormatInt(*psc.RunAsUser, 10) == df.uid)
	check("fsGroup makes the volume writable", psc.FSGroup != nil && psc.RunAsGroup != nil && *psc.FSGroup == *psc.RunAsGroup)
	check("seccomp RuntimeDefault", psc.SeccompProfile != nil && psc.SeccompProfile.Type == corev1.SeccompProfileTypeRuntimeDefault)
	check("container runAsNonRoot", csc.RunAsNonRoot != nil && *csc.RunAsNonRoot)
	check("no privilege escalation", csc.AllowPrivilegeEscalation != nil && !*csc.AllowPrivilegeEscalation)
	check("read-only root filesystem", csc.ReadOnlyRootFilesystem != nil && *csc.ReadOnlyRootFilesystem)
	check("not privileged", csc.Privileged == nil || !*csc.Privileged)
	check("drops ALL capabilities", csc.Capabilities != nil && len(csc.Capabilities.Add) == 0 &&
		len(csc.Capabilities.Drop) == 1 && csc.Capabilities.Drop[0] == "ALL")
	check("no service account token", ps.AutomountServiceAccountToken != nil && !*ps.AutomountServiceAccountToken)
	check("no host namespaces", !ps.HostNetwork && !ps.HostPID && !ps.HostIPC)
}

func TestResources(t *testing.T) { eachForm(t, testResources) }

func testResources(t *testing.T, m manifests) {
	c := m.container(t)
	for _, r := range []corev1.ResourceName{corev1.ResourceCPU, corev1.ResourceMemory} {
		req, okReq := c.Resources.Requests[r]
		lim, okLim := c.Resources.Limits[r]
		if !okReq || !okLim {
			t.Errorf("%s: request and limit both required", r)
			continue
		}
		if req.Cmp(lim) > 0 {
			t.Errorf("%s request %s above limit %s", r, req.String(), lim.String())
		}
	}
	// GOMEMLIMIT (runtime package documentation, Go 1.19+) is a soft limit:
	// below the container's limit, or the kernel kills before the collector
	// reacts; near it, or memory is left unused.
	lim := c.Resources.Limits[corev1.ResourceMemory]
	// GOGC above the default (or off) lets the heap grow further between
	// cycles; only GOMEMLIMIT then keeps it under the container's limit.
	env := map[string]string{}
	for _, e := range c.Env {
		env[e.Name] = e.Value
	}
	if g, ok := env["GOGC"]; ok {
		n, err := strconv.Atoi(g)
		if (err != nil && g != "off") || (err == nil && (n < 100 || n > 800)) {
			t.Errorf("GOGC %q: want off or 100 to 800", g)
		}
		if _, ok := env["GOMEMLIMIT"]; !ok && (g == "off" || n > 100) {
			t.Errorf("GOGC %s without GOMEMLIMIT: nothing bounds the heap below the memory limit", g)
		}
	}
	for _, e := range c.Env {
		if e.Name != "GOMEMLIMIT" {
			continue
		}
		n, err := parseGoMemLimit(e.Value)
		if err != nil {
			t.Fatalf("GOMEMLIMIT: %v", err)
		}
		if ratio := float64(n) / float64(lim.Value()); ratio >= 1 || ratio < 0.75 {
			t.Errorf("GOMEMLIMIT %s is %.0f %% of the memory limit %s, want 75 to 99 %%", e.Value, ratio*100, lim.String())
		}
		return
	}
	t.Error("GOMEMLIMIT not set")
}

// parseGoMemLimit reads GOMEMLIMIT's syntax: a byte count with an optional
// B, KiB, MiB, GiB or TiB suffix (runtime package documentation).
func parseGoMemLimit(s string) (int64, error) {
	units := []struct {
		suffix string
		mult   int64
	}{{"TiB", 1 << 40}, {"GiB", 1 << 30}, {"MiB", 1 << 20}, {"KiB", 1 << 10}, {"B", 1}}
	mult := int64(1)
	for _, u := range units {
		if v, ok := strings.CutSuffix(s, u.suffix); ok {
			s, mult = v, u.mult
			break
		}
	}
	n, err := strconv.ParseInt(s, 10, 64)
	if err != nil || n < 0 {
		return 0, fmt.Errorf("%q is not a GOMEMLIMIT value", s)
	}
	return n * mult, nil
}

func TestParseGoMemLimit(t *testing.T) {
	tests := []struct {
		in      string
		want    int64
		wantErr bool
	}{
		{"460MiB", 460 << 20, false},
		{"1GiB", 1 << 30, false},
		{"1024", 1024, false},
		{"512Mi", 0, true}, // Kubernetes' suffix, not Go's
		{"lots", 0, true},
	}
	for _, tc := range tests {
		t.Run(tc.in, func(t *testing.T) {
			got, err := parseGoMemLimit(tc.in)
			if (err != nil) != tc.wantErr || got != tc.want {
				t.Errorf("got %d, %v; want %d, error %v", got, err, tc.want, tc.wantErr)
			}
		})
	}
}

// containerPort resolves a probe's or policy's port, by name or number, to
// the container's port number.
func containerPort(c corev1.Container, p intstr.IntOrString) (int32, bool) {
	for _, cp := range c.Ports {
		if (p.Type == intstr.String && cp.Name == p.StrVal) || (p.Type == intstr.Int && cp.ContainerPort == p.IntVal) {
			return cp.ContainerPort, true
		}
	}
	return 0, false
}

// podEnv is the container's environment as Kubernetes builds it: the
// image's ENV, then envFrom, then env, later winning (Kubernetes API
// reference, Container.env: "takes precedence over envFrom"). Secret
// references take the example Secret's placeholder values.
func podEnv(t *testing.T, m manifests) map[string]string {
	t.Helper()
	c := m.container(t)
	env := map[string]string{}
	for k, v := range loadDockerfile(t).env {
		env[k] = v
	}
	for _, ef := range c.EnvFrom {
		switch {
		case ef.ConfigMapRef != nil:
			if ef.ConfigMapRef.Name != m.configMap.Name {
				t.Fatalf("envFrom ConfigMap %q does not exist", ef.ConfigMapRef.Name)
			}
			for k, v := range m.configMap.Data {
				env[ef.Prefix+k] = v
			}
		default:
			t.Fatalf("envFrom %+v: only the ConfigMap is expected", ef)
		}
	}
	for _, e := range c.Env {
		switch {
		case e.ValueFrom == nil:
			env[e.Name] = e.Value
		case e.ValueFrom.SecretKeyRef != nil:
			ref := e.ValueFrom.SecretKeyRef
			if ref.Name != m.secret.Name {
				t.Fatalf("%s refers to Secret %q; only %q is documented", e.Name, ref.Name, m.secret.Name)
			}
			v, ok := m.secret.StringData[ref.Key]
			if !ok {
				t.Fatalf("%s refers to key %q, which %s does not show", e.Name, ref.Key, secretExample)
			}
			env[e.Name] = v
		case e.ValueFrom.ConfigMapKeyRef != nil:
			ref := e.ValueFrom.ConfigMapKeyRef
			v, ok := m.configMap.Data[ref.Key]
			if ref.Name != m.configMap.Name || !ok {
				t.Fatalf("%s refers to ConfigMap %q key %q, which does not exist", e.Name, ref.Name, ref.Key)
			}
			env[e.Name] = v
		default:
			t.Fatalf("%s: unexpected valueFrom %+v", e.Name, e.ValueFrom)
		}
	}
	return env
}

func TestSecretExample(t *testing.T) { eachForm(t, testSecretExample) }

func testSecretExample(t *testing.T, m manifests) {
	if len(m.secret.Data) > 0 {
		t.Error("the example uses data: placeholders belong in stringData, readable as placeholders")
	}
	for k, v := range m.secret.StringData {
		if !strings.Contains(v, "REPLACE-ME") {
			t.Errorf("%s: value of %s is not marked as a placeholder", secretExample, k)
		}
	}
	// Every key the Deployment reads is shown in the example, and the one
	// it cannot do without is not optional.
	c := m.container(t)
	for _, e := range c.Env {
		if e.ValueFrom == nil || e.ValueFrom.SecretKeyRef == nil {
			continue
		}
		ref := e.ValueFrom.SecretKeyRef
		if _, ok := m.secret.StringData[ref.Key]; !ok {
			t.Errorf("%s: key %q missing from %s", e.Name, ref.Key, secretExample)
		}
		optional := ref.Optional != nil && *ref.Optional
		if e.Name == "DEADSPACE_WEBHOOK_SECRET" && optional {
			t.Errorf("the webhook secret is required by the service, yet optional here")
		}
	}
}

func TestPodEnvironmentIsAValidServeConfig(t *testing.T) {
	eachForm(t, testPodEnvironmentIsAValidServeConfig)
}

func testPodEnvironmentIsAValidServeConfig(t *testing.T, m manifests) {
	env := podEnv(t, m)
	checkEnvNames(t, "pod environment", env)
	for _, k := range []string{"DEADSPACE_WEBHOOK_SECRET", "DEADSPACE_FHIR_TOKEN", "DEADSPACE_FHIR_TOKEN_FILE", "DEADSPACE_WEBHOOK_SECRET_FILE", "DEADSPACE_UI_SESSION_KEY"} {
		if _, ok := m.configMap.Data[k]; ok {
			t.Errorf("%s is in the ConfigMap: secrets go in the Secret", k)
		}
	}
	// The data dir must exist for nothing here: Validate checks settings, it
	// does not open the store.
	cfg, err := serveConfig(env)
	if err != nil {
		t.Fatalf("deadspace serve would refuse the pod's environment:\n%v", err)
	}
	c := m.container(t)

	// The replicated form keeps its state in PostgreSQL: see TestReplicatedForm.
	if !m.form.replicated {
		t.Run("data dir is the mounted volume", func(t *testing.T) {
			var claim string
			for _, v := range m.deployment.Spec.Template.Spec.Volumes {
				if v.PersistentVolumeClaim != nil {
					for _, vm := range c.VolumeMounts {
						if vm.Name == v.Name && vm.MountPath == cfg.DataDir && !vm.ReadOnly {
							claim = v.PersistentVolumeClaim.ClaimName
						}
					}
				}
			}
			if claim != m.pvc.Name {
				t.Errorf("data dir %s is not a writable mount of PVC %s (found claim %q)", cfg.DataDir, m.pvc.Name, claim)
			}
		})
	}

	t.Run("probes reach the HTTP listener", func(t *testing.T) {
		_, port, err := net.SplitHostPort(cfg.Listen)
		if err != nil {
			t.Fatal(err)
		}
		probes := map[string]*corev1.Probe{"/healthz": c.LivenessProbe, "/readyz": c.ReadinessProbe}
		for path, p := range probes {
			if p == nil || p.HTTPGet == nil {
				t.Errorf("%s: no HTTP probe", path)
				continue
			}
			if p.HTTPGet.Path != path {
				t.Errorf("probe path %q, want %q", p.HTTPGet.Path, path)
			}
			n, ok := containerPort(c, p.HTTPGet.Port)
			if !ok || strconv.Itoa(int(n)) != port {
				t.Errorf("%s probes port %v (%d), the service listens on %s", path, p.HTTPGet.Port.String(), n, cfg.Listen)
			}
		}
	})

	t.Run("listeners match container and Service ports", func(t *testing.T) {
		want := map[string]string{"http": env["DEADSPACE_LISTEN"], "grpc": env["DEADSPACE_GRPC_LISTEN"]}
		for name, addr := range want {
			host, port, err := net.SplitHostPort(addr)
			if err != nil {
				t.Errorf("%s address %q: %v", name, addr, err)
				continue
			}
			if host != "0.0.0.0" && host != "" && host != "::" {
				t.Errorf("%s listens on %s: unreachable from outside the pod", name, addr)
			}
			n, ok := containerPort(c, intstr.FromString(name))
			if !ok || strconv.Itoa(int(n)) != port {
				t.Errorf("container port %q = %d, the service listens on %s", name, n, addr)
			}
			found := false
			for _, sp := range m.service.Spec.Ports {
				if sp.Name == name {
					found = true
					if tp, ok := containerPort(c, sp.TargetPort); !ok || tp != n {
						t.Errorf("Service port %s targets %v, not container port %d", name, sp.TargetPort.String(), n)
					}
				}
			}
			if !found {
				t.Errorf("Service has no port %q", name)
			}
		}
		for _, cp := range c.Ports {
			if errs := validation.IsValidPortName(cp.Name); len(errs) > 0 {
				t.Errorf("port name %q: %v", cp.Name, errs)
			}
		}
	})

	t.Run("public URL is the Service", func(t *testing.T) {
		if !cfg.Register {
			t.Skip("registration off: no public URL needed")
		}
		u, err := url.Parse(cfg.PublicURL)
		if err != nil {
			t.Fatal(err)
		}
		wantHost := m.service.Name + "." + m.kust.Namespace + ".svc.cluster.local"
		var httpPort int32
		for _, sp := range m.service.Spec.Ports {
			if sp.Name == "http" {
				httpPort = sp.Port
			}
		}
		if u.Hostname() != wantHost || u.Port() != strconv.Itoa(int(httpPort)) {
			t.Errorf("public URL %s; the Service answers at %s:%d", cfg.PublicURL, wantHost, httpPort)
		}
	})
}

func TestNetworkPolicy(t *testing.T) { eachForm(t, testNetworkPolicy) }

func testNetworkPolicy(t *testing.T, m manifests) {
	np := m.netpol.Spec
	c := m.container(t)
	types := map[networkingv1.PolicyType]bool{}
	for _, pt := range np.PolicyTypes {
		types[pt] = true
	}
	if !types[networkingv1.PolicyTypeIngress] || !types[networkingv1.PolicyTypeEgress] {
		t.Errorf("policyTypes %v: both Ingress and Egress, so everything unlisted is denied", np.PolicyTypes)
	}

	t.Run("ingress reaches only the two listeners", func(t *testing.T) {
		open := map[int32]bool{}
		for i, r := range np.Ingress {
			if len(r.From) == 0 {
				t.Errorf("ingress rule %d allows every source", i)
			}
			if len(r.Ports) == 0 {
				t.Errorf("ingress rule %d allows every port", i)
			}
			for _, p := range r.Ports {
				if p.Port == nil {
					t.Errorf("ingress rule %d: a port without a number or name", i)
					continue
				}
				n, ok := containerPort(c, *p.Port)
				if !ok {
					t.Errorf("ingress rule %d: port %v is not a container port", i, p.Port.String())
				}
				open[n] = true
			}
		}
		for _, cp := range c.Ports {
			if !open[cp.ContainerPort] {
				t.Errorf("container port %s (%d) admits no traffic", cp.Name, cp.ContainerPort)
			}
		}
	})

	t.Run("egress has DNS over UDP and TCP", func(t *testing.T) {
		// DNS falls back to TCP for answers too large for UDP (RFC 7766).
		got := map[corev1.Protocol]bool{}
		for _, r := range np.Egress {
			for _, p := range r.Ports {
				if p.Port != nil && p.Port.IntValue() == 53 && p.Protocol != nil {
					got[*p.Protocol] = true
				}
			}
		}
		if !got[corev1.ProtocolUDP] || !got[corev1.ProtocolTCP] {
			t.Errorf("DNS egress protocols %v, want UDP and TCP", got)
		}
	})

	t.Run("egress reaches the configured FHIR server", func(t *testing.T) {
		u, err := url.Parse(m.configMap.Data["DEADSPACE_FHIR_BASE"])
		if err != nil || u.Host == "" {
			t.Fatalf("DEADSPACE_FHIR_BASE %q: %v", m.configMap.Data["DEADSPACE_FHIR_BASE"], err)
		}
		port := u.Port()
		if port == "" {
			port = map[string]string{"http": "80", "https": "443"}[u.Scheme]
		}
		// A cluster-internal name is service.namespace.svc...: the policy
		// must admit that namespace on that port.
		parts := strings.Split(u.Hostname(), ".")
		if len(parts) < 3 || parts[2] != "svc" {
			t.Skipf("FHIR server %s is outside the cluster: the policy needs an ipBlock, which cannot be checked here", u.Host)
		}
		if ns := parts[1]; !egressAdmits(np, ns, port) {
			t.Errorf("no egress rule admits namespace %q on port %s for %s", ns, port, u)
		}
	})
}

func TestDeploymentReferencesExist(t *testing.T) { eachForm(t, testDeploymentReferencesExist) }

func testDeploymentReferencesExist(t *testing.T, m manifests) {
	ps := m.deployment.Spec.Template.Spec
	c := m.container(t)
	vols := map[string]bool{}
	for _, v := range ps.Volumes {
		vols[v.Name] = true
		if v.PersistentVolumeClaim != nil && (m.pvc == nil || v.PersistentVolumeClaim.ClaimName != m.pvc.Name) {
			t.Errorf("volume %s claims %q, which is not the form's PVC", v.Name, v.PersistentVolumeClaim.ClaimName)
		}
	}
	for _, vm := range c.VolumeMounts {
		if !vols[vm.Name] {
			t.Errorf("mount %s names no volume", vm.Name)
		}
	}
	// podEnv fails on any ConfigMap or Secret reference that does not exist.
	_ = podEnv(t, m)
	if c.Image == "" || !strings.Contains(c.Image, ":") {
		t.Errorf("image %q has no tag", c.Image)
	}
	var names []string
	for _, p := range c.Ports {
		names = append(names, p.Name)
	}
	sort.Strings(names)
	if strings.Join(names, ",") != "grpc,http" {
		t.Errorf("container ports %v, want grpc and http", names)
	}
}

// TestReplicatedForm checks what the replicated form promises: three
// replicas updated one at a time, the database URL only from the Secret,
// no volume, a budget that lets one pod go at a time, and a network policy
// that reaches the database the URL names.
func TestReplicatedForm(t *testing.T) {
	m := loadManifests(t, replicatedForm)
	d := m.deployment.Spec
	if d.Replicas == nil || *d.Replicas != 3 {
		t.Errorf("replicas = %v, want 3", d.Replicas)
	}
	ru := d.Strategy.RollingUpdate
	if d.Strategy.Type != appsv1.RollingUpdateDeploymentStrategyType || ru == nil || ru.MaxUnavailable == nil ||
		ru.MaxUnavailable.IntValue() != 0 {
		t.Errorf("strategy %+v: want RollingUpdate with maxUnavailable 0, so an update never drops below three ready pods", d.Strategy)
	}
	if len(d.Template.Spec.Volumes) != 0 || len(m.container(t).VolumeMounts) != 0 {
		t.Errorf("volumes %v: the replicas share nothing but the database", d.Template.Spec.Volumes)
	}

	// One voluntary disruption at a time: a drain proceeds (the budget is
	// below the replica count) and never leaves a single pod.
	p := m.pdb.Spec
	if p.MinAvailable == nil || p.MinAvailable.IntValue() != int(*d.Replicas)-1 || p.MaxUnavailable != nil {
		t.Errorf("PDB minAvailable %v maxUnavailable %v, want minAvailable %d", p.MinAvailable, p.MaxUnavailable, *d.Replicas-1)
	}

	var fromSecret bool
	for _, e := range m.container(t).Env {
		if e.Name == "DEADSPACE_STORE" {
			ref := e.ValueFrom
			fromSecret = e.Value == "" && ref != nil && ref.SecretKeyRef != nil && ref.SecretKeyRef.Name == m.secret.Name &&
				(ref.SecretKeyRef.Optional == nil || !*ref.SecretKeyRef.Optional)
		}
	}
	if !fromSecret {
		t.Error("DEADSPACE_STORE must come from the Secret, required: the URL carries the database password")
	}
	// The replicas share the pages' session key, from the Secret, so a
	// session works on every replica and survives a rolling update.
	var sessionKey bool
	for _, e := range m.container(t).Env {
		if e.Name == "DEADSPACE_UI_SESSION_KEY" {
			ref := e.ValueFrom
			sessionKey = e.Value == "" && ref != nil && ref.SecretKeyRef != nil && ref.SecretKeyRef.Name == m.secret.Name
		}
	}
	if !sessionKey {
		t.Error("DEADSPACE_UI_SESSION_KEY must come from the Secret: without one key shared by the replicas, a session opened on one is refused by the others")
	}
	if _, ok := m.configMap.Data["DEADSPACE_STORE"]; ok {
		t.Error("DEADSPACE_STORE is in the ConfigMap: the URL carries a password")
	}
	cfg, err := serveConfig(podEnv(t, m))
	if err != nil {
		t.Fatalf("deadspace serve would refuse the pod's environment:\n%v", err)
	}
	db, err := url.Parse(cfg.Store)
	if err != nil || (db.Scheme != "postgres" && db.Scheme != "postgresql") {
		t.Fatalf("the pod's store is %q, want a postgres:// URL", cfg.Store)
	}
	if db.Query().Get("sslmode") != "verify-full" {
		t.Errorf("the example database URL has sslmode %q: verify-full checks the server's certificate", db.Query().Get("sslmode"))
	}

	// The network policy admits the database's namespace on its port.
	port := db.Port()
	if port == "" {
		port = "5432"
	}
	parts := strings.Split(db.Hostname(), ".")
	if len(parts) < 3 || parts[2] != "svc" {
		t.Fatalf("the example database %s is not a cluster service name", db.Host)
	}
	if !egressAdmits(m.netpol.Spec, parts[1], port) {
		t.Errorf("no egress rule admits namespace %q on port %s for the database", parts[1], port)
	}
}

// egressAdmits says whether one egress rule of the policy admits the
// namespace (by its kubernetes.io/metadata.name label) on the port.
func egressAdmits(np networkingv1.NetworkPolicySpec, namespace, port string) bool {
	for _, r := range np.Egress {
		nsOK, portOK := false, false
		for _, peer := range r.To {
			if peer.NamespaceSelector != nil && peer.NamespaceSelector.MatchLabels["kubernetes.io/metadata.name"] == namespace {
				nsOK = true
			}
		}
		for _, p := range r.Ports {
			if p.Port != nil && strconv.Itoa(p.Port.IntValue()) == port {
				portOK = true
			}
		}
		if nsOK && portOK {
			return true
		}
	}
	return false
}
