package systemtest

import (
	"bufio"
	"bytes"
	"errors"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	appsv1 "k8s.io/api/apps/v1"
	batchv1 "k8s.io/api/batch/v1"
	corev1 "k8s.io/api/core/v1"
	policyv1 "k8s.io/api/policy/v1"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"k8s.io/apimachinery/pkg/labels"
	"k8s.io/apimachinery/pkg/util/intstr"
	utilyaml "k8s.io/apimachinery/pkg/util/yaml"
	"sigs.k8s.io/yaml"
)

// kubeObjects are the manifests of deploy/kubernetes, decoded strictly into
// the Kubernetes API types: an unknown or misspelt field fails the decode.
type kubeObjects struct {
	deployments []*appsv1.Deployment
	jobs        []*batchv1.Job
	services    []*corev1.Service
	configMaps  map[string]*corev1.ConfigMap
	secrets     map[string]*corev1.Secret
	budgets     []*policyv1.PodDisruptionBudget
	files       []string
}

// kustomization is the part of kustomization.yaml the checks read.
type kustomization struct {
	APIVersion string   `json:"apiVersion"`
	Kind       string   `json:"kind"`
	Resources  []string `json:"resources"`
	Images     []struct {
		Name    string `json:"name"`
		NewName string `json:"newName"`
		NewTag  string `json:"newTag"`
	} `json:"images"`
}

func readKubernetes(t testing.TB) (kubeObjects, kustomization) {
	t.Helper()
	dir := filepath.Join("deploy", "kubernetes")
	entries, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	objs := kubeObjects{configMaps: map[string]*corev1.ConfigMap{}, secrets: map[string]*corev1.Secret{}}
	var kust kustomization
	for _, e := range entries {
		name := e.Name()
		data, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			t.Fatal(err)
		}
		if name == "kustomization.yaml" {
			if err := yaml.UnmarshalStrict(data, &kust); err != nil {
				t.Fatalf("%s: %v", name, err)
			}
			continue
		}
		if filepath.Ext(name) != ".yaml" {
			t.Errorf("deploy/kubernetes/%s: only .yaml manifests belong here", name)
			continue
		}
		objs.files = append(objs.files, name)
		reader := utilyaml.NewYAMLReader(bufio.NewReader(bytes.NewReader(data)))
		for {
			doc, err := reader.Read()
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatalf("%s: %v", name, err)
			}
			if len(bytes.TrimSpace(doc)) == 0 {
				continue
			}
			objs.decode(t, name, doc)
		}
	}
	return objs, kust
}

func (o *kubeObjects) decode(t testing.TB, file string, doc []byte) {
	t.Helper()
	var meta metav1.TypeMeta
	if err := yaml.Unmarshal(doc, &meta); err != nil {
		t.Fatalf("%s: %v", file, err)
	}
	var obj any
	var apiVersion string
	switch meta.Kind {
	case "Deployment":
		d := &appsv1.Deployment{}
		o.deployments, obj, apiVersion = append(o.deployments, d), d, "apps/v1"
	case "Job":
		j := &batchv1.Job{}
		o.jobs, obj, apiVersion = append(o.jobs, j), j, "batch/v1"
	case "Service":
		s := &corev1.Service{}
		o.services, obj, apiVersion = append(o.services, s), s, "v1"
	case "PodDisruptionBudget":
		b := &policyv1.PodDisruptionBudget{}
		o.budgets, obj, apiVersion = append(o.budgets, b), b, "policy/v1"
	case "ConfigMap":
		obj, apiVersion = &corev1.ConfigMap{}, "v1"
	case "Secret":
		obj, apiVersion = &corev1.Secret{}, "v1"
	default:
		t.Fatalf("%s: kind %q has no check here; add one", file, meta.Kind)
	}
	if meta.APIVersion != apiVersion {
		t.Errorf("%s: %s is apiVersion %q, want %q", file, meta.Kind, meta.APIVersion, apiVersion)
	}
	if err := yaml.UnmarshalStrict(doc, obj); err != nil {
		t.Fatalf("%s: %s does not decode as the Kubernetes type: %v", file, meta.Kind, err)
	}
	switch v := obj.(type) {
	case *corev1.ConfigMap:
		o.configMaps[v.Name] = v
	case *corev1.Secret:
		o.secrets[v.Name] = v
	}
}

// secretKeys lists a Secret's keys, from data and stringData.
func secretKeys(s *corev1.Secret) []string {
	keys := slices.Collect(mapKeys(s.StringData))
	for k := range s.Data {
		keys = append(keys, k)
	}
	return keys
}

// qtallyContainer is a container that runs the qtally image, with the pod
// it belongs to.
type qtallyContainer struct {
	where string
	pod   corev1.PodTemplateSpec
	c     corev1.Container
	inv   invocation
	env   map[string]string // literal values, ConfigMap values included
}

// TestKubernetesManifestsRunRealCommands decodes every manifest into the
// Kubernetes API types and checks the qtally containers against the
// binary: commands and flags exist, every variable set is one the command
// reads and every reference resolves, ports and probes point where the
// process listens, and the objects select each other.
func TestKubernetesManifestsRunRealCommands(t *testing.T) {
	t.Parallel()
	commands := qtallyCommands(t)
	objs, kust := readKubernetes(t)

	if kust.Kind != "Kustomization" {
		t.Errorf("kustomization.yaml is kind %q", kust.Kind)
	}
	resources := slices.Clone(kust.Resources)
	slices.Sort(resources)
	if !slices.Equal(resources, objs.files) {
		t.Errorf("kustomization.yaml lists %v; the folder holds %v", resources, objs.files)
	}
	if len(kust.Images) != 1 || kust.Images[0].Name != "qtally" {
		t.Fatalf("kustomization.yaml should set the tag of image %q (one entry), has %+v", "qtally", kust.Images)
	}
	uid := imageUID(t)

	var containers []qtallyContainer
	collect := func(kind, name string, pod corev1.PodTemplateSpec) {
		spec := pod.Spec
		if sc := spec.SecurityContext; sc == nil || sc.RunAsNonRoot == nil || !*sc.RunAsNonRoot ||
			sc.RunAsUser == nil || *sc.RunAsUser != uid {
			t.Errorf("%s %s: the pod must set runAsNonRoot and runAsUser %d (the image's USER)", kind, name, uid)
		}
		if len(spec.InitContainers) > 0 {
			t.Errorf("%s %s: init containers are not checked here", kind, name)
		}
		for _, c := range spec.Containers {
			where := kind + " " + name + " container " + c.Name
			if c.Image != kust.Images[0].Name {
				t.Errorf("%s runs image %q; every container runs %q, tagged by kustomization.yaml", where, c.Image, kust.Images[0].Name)
				continue
			}
			if len(c.Command) > 0 {
				t.Errorf("%s overrides the entrypoint with %q; give qtally's arguments in args", where, c.Command)
			}
			inv, ok := parseInvocation(t, commands, where, c.Args)
			if !ok {
				continue
			}
			containers = append(containers, qtallyContainer{where: where, pod: pod, c: c, inv: inv, env: containerEnv(t, objs, where, c)})
		}
	}
	for _, d := range objs.deployments {
		collect("Deployment", d.Name, d.Spec.Template)
		sel, err := metav1.LabelSelectorAsSelector(d.Spec.Selector)
		if err != nil || !sel.Matches(labels.Set(d.Spec.Template.Labels)) {
			t.Errorf("Deployment %s: its selector does not match its pod labels (%v)", d.Name, err)
		}
	}
	for _, j := range objs.jobs {
		collect("Job", j.Name, j.Spec.Template)
		if rp := j.Spec.Template.Spec.RestartPolicy; rp != corev1.RestartPolicyOnFailure && rp != corev1.RestartPolicyNever {
			t.Errorf("Job %s: restartPolicy %q", j.Name, rp)
		}
	}

	byCommand := map[string][]qtallyContainer{}
	for _, qc := range containers {
		byCommand[qc.inv.command.name] = append(byCommand[qc.inv.command.name], qc)
		checkEnvRead(t, qc.where, qc.inv.command, envNames(t, objs, qc.c))
		req := qc.c.Resources.Requests
		if req.Cpu().IsZero() || req.Memory().IsZero() || qc.c.Resources.Limits.Memory().IsZero() {
			t.Errorf("%s: set cpu and memory requests and a memory limit", qc.where)
		}
		sc := qc.c.SecurityContext
		if sc == nil || sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation || sc.ReadOnlyRootFilesystem == nil || !*sc.ReadOnlyRootFilesystem {
			t.Errorf("%s: set allowPrivilegeEscalation false and readOnlyRootFilesystem true (qtally writes no files)", qc.where)
		}
		if qc.inv.command.name == "serve" || qc.inv.command.name == "worker" {
			checkServingContainer(t, qc)
		}
	}
	if m := byCommand["migrate"]; len(m) != 1 || !strings.HasPrefix(m[0].where, "Job ") {
		t.Errorf("want one Job running qtally migrate, have %d containers running it", len(m))
	}
	if len(byCommand["serve"]) != 1 || len(byCommand["worker"]) != 1 {
		t.Fatalf("want one Deployment running qtally serve and one running qtally worker, have %d and %d", len(byCommand["serve"]), len(byCommand["worker"]))
	}
	api := byCommand["serve"][0]
	if api.inv.set["no-worker"] != "true" {
		t.Errorf("%s: the API should leave training to the workers (--no-worker)", api.where)
	}

	for _, s := range objs.services {
		pods := selectedPods(t, objs, s.Spec.Selector)
		if len(pods) != 1 || pods[0].Name != "qtally-api" {
			t.Errorf("Service %s selects Deployments %v, want qtally-api alone", s.Name, deploymentNames(pods))
			continue
		}
		for _, p := range s.Spec.Ports {
			if got := containerPort(t, api.c, p.TargetPort); got != api.inv.listenPort(t, api.env) {
				t.Errorf("Service %s: targetPort %s is port %s; the API listens on %s", s.Name, p.TargetPort.String(), got, api.inv.listenPort(t, api.env))
			}
		}
	}
	for _, want := range []string{"qtally-api", "qtally-worker"} {
		covered := false
		for _, b := range objs.budgets {
			sel, err := metav1.LabelSelectorAsSelector(b.Spec.Selector)
			if err != nil {
				t.Fatalf("PodDisruptionBudget %s: %v", b.Name, err)
			}
			pods := selectedPods(t, objs, sel.String())
			if len(pods) != 1 {
				t.Errorf("PodDisruptionBudget %s selects Deployments %v, want one", b.Name, deploymentNames(pods))
				continue
			}
			covered = covered || pods[0].Name == want
			if b.Spec.MinAvailable == nil && b.Spec.MaxUnavailable == nil {
				t.Errorf("PodDisruptionBudget %s sets neither minAvailable nor maxUnavailable", b.Name)
			}
			if b.Spec.MinAvailable != nil && pods[0].Spec.Replicas != nil && b.Spec.MinAvailable.IntValue() >= int(*pods[0].Spec.Replicas) {
				t.Errorf("PodDisruptionBudget %s keeps %s of %d replicas: no node could ever drain", b.Name, b.Spec.MinAvailable.String(), *pods[0].Spec.Replicas)
			}
		}
		if !covered {
			t.Errorf("no PodDisruptionBudget covers Deployment %s", want)
		}
	}
}

// checkServingContainer checks the ports, probes, scrape annotations and
// shutdown timing of a long-running qtally container.
func checkServingContainer(t testing.TB, qc qtallyContainer) {
	t.Helper()
	port := qc.inv.listenPort(t, qc.env)
	if len(qc.c.Ports) != 1 || strconv.Itoa(int(qc.c.Ports[0].ContainerPort)) != port {
		t.Errorf("%s declares ports %+v; qtally %s listens on %s alone", qc.where, qc.c.Ports, qc.inv.command.name, port)
	}
	probes := []struct {
		name  string
		probe *corev1.Probe
		path  string
	}{{"readinessProbe", qc.c.ReadinessProbe, "/readyz"}, {"livenessProbe", qc.c.LivenessProbe, "/livez"}, {"startupProbe", qc.c.StartupProbe, ""}}
	for _, p := range probes {
		if p.probe == nil {
			if p.path != "" {
				t.Errorf("%s has no %s", qc.where, p.name)
			}
			continue
		}
		get := p.probe.HTTPGet
		if get == nil {
			t.Errorf("%s: %s is not an HTTP GET", qc.where, p.name)
			continue
		}
		if (p.path != "" && get.Path != p.path) || (get.Path != "/readyz" && get.Path != "/livez") {
			t.Errorf("%s: %s asks %s, want %s", qc.where, p.name, get.Path, p.path)
		}
		if got := containerPort(t, qc.c, get.Port); got != port {
			t.Errorf("%s: %s asks port %s; qtally listens on %s", qc.where, p.name, got, port)
		}
	}
	ann := qc.pod.Annotations
	if ann["prometheus.io/scrape"] != "true" || ann["prometheus.io/port"] != port || ann["prometheus.io/path"] != "/metrics" {
		t.Errorf("%s: scrape annotations %v, want port %s and path /metrics", qc.where, ann, port)
	}
	grace, err := time.ParseDuration(qc.inv.setting(t, "shutdown-grace", qc.env))
	if err != nil {
		t.Fatalf("%s: --shutdown-grace: %v", qc.where, err)
	}
	var pause time.Duration
	if l := qc.c.Lifecycle; l != nil && l.PreStop != nil {
		if l.PreStop.Sleep == nil {
			t.Errorf("%s: preStop can only sleep (the image has no shell)", qc.where)
		} else {
			pause = time.Duration(l.PreStop.Sleep.Seconds) * time.Second
		}
	}
	kill := 30 * time.Second // Kubernetes' default terminationGracePeriodSeconds
	if s := qc.pod.Spec.TerminationGracePeriodSeconds; s != nil {
		kill = time.Duration(*s) * time.Second
	}
	if kill <= pause+grace {
		t.Errorf("%s: Kubernetes kills after %v, before the preStop pause (%v) and shutdown grace (%v) are over", qc.where, kill, pause, grace)
	}
}

// containerEnv returns the literal environment of a container: ConfigMaps
// it loads and plain values (Secret values are not needed by any check).
func containerEnv(t testing.TB, objs kubeObjects, where string, c corev1.Container) map[string]string {
	t.Helper()
	env := map[string]string{}
	for _, from := range c.EnvFrom {
		if ref := from.ConfigMapRef; ref != nil {
			cm, ok := objs.configMaps[ref.Name]
			if !ok {
				t.Errorf("%s loads ConfigMap %s, which is not among the manifests", where, ref.Name)
				continue
			}
			for k, v := range cm.Data {
				env[from.Prefix+k] = v
			}
		}
	}
	for _, e := range c.Env {
		if e.ValueFrom == nil {
			env[e.Name] = e.Value
		}
	}
	return env
}

// envNames lists every variable a container gets, checking that each
// reference names an object and key that exist.
func envNames(t testing.TB, objs kubeObjects, c corev1.Container) []string {
	t.Helper()
	var names []string
	for _, from := range c.EnvFrom {
		switch {
		case from.ConfigMapRef != nil:
			if cm, ok := objs.configMaps[from.ConfigMapRef.Name]; ok {
				for k := range cm.Data {
					names = append(names, from.Prefix+k)
				}
			}
		case from.SecretRef != nil:
			s, ok := objs.secrets[from.SecretRef.Name]
			if !ok {
				t.Errorf("container %s loads Secret %s, which is not among the manifests", c.Name, from.SecretRef.Name)
				continue
			}
			for _, k := range secretKeys(s) {
				names = append(names, from.Prefix+k)
			}
		}
	}
	for _, e := range c.Env {
		names = append(names, e.Name)
		if e.ValueFrom == nil {
			continue
		}
		switch ref := e.ValueFrom; {
		case ref.SecretKeyRef != nil:
			s, ok := objs.secrets[ref.SecretKeyRef.Name]
			if !ok || !slices.Contains(secretKeys(s), ref.SecretKeyRef.Key) {
				t.Errorf("container %s: %s comes from Secret %s key %s, which the manifests do not define", c.Name, e.Name, ref.SecretKeyRef.Name, ref.SecretKeyRef.Key)
			}
		case ref.ConfigMapKeyRef != nil:
			cm, ok := objs.configMaps[ref.ConfigMapKeyRef.Name]
			if _, has := cm.Data[ref.ConfigMapKeyRef.Key]; !ok || !has {
				t.Errorf("container %s: %s comes from ConfigMap %s key %s, which the manifests do not define", c.Name, e.Name, ref.ConfigMapKeyRef.Name, ref.ConfigMapKeyRef.Key)
			}
		default:
			t.Errorf("container %s: %s comes from a source not checked here", c.Name, e.Name)
		}
	}
	return names
}

// containerPort resolves a port given by number or by name.
func containerPort(t testing.TB, c corev1.Container, p intstr.IntOrString) string {
	t.Helper()
	if p.Type == intstr.Int {
		return strconv.Itoa(p.IntValue())
	}
	for _, cp := range c.Ports {
		if cp.Name == p.StrVal {
			return strconv.Itoa(int(cp.ContainerPort))
		}
	}
	t.Errorf("container %s has no port named %q", c.Name, p.StrVal)
	return ""
}

// selectedPods returns the Deployments whose pods a selector matches.
func selectedPods[S string | map[string]string](t testing.TB, objs kubeObjects, selector S) []*appsv1.Deployment {
	t.Helper()
	var sel labels.Selector
	switch s := any(selector).(type) {
	case string:
		var err error
		if sel, err = labels.Parse(s); err != nil {
			t.Fatal(err)
		}
	case map[string]string:
		if len(s) == 0 {
			return nil
		}
		sel = labels.SelectorFromSet(s)
	}
	var out []*appsv1.Deployment
	for _, d := range objs.deployments {
		if sel.Matches(labels.Set(d.Spec.Template.Labels)) {
			out = append(out, d)
		}
	}
	return out
}

func deploymentNames(ds []*appsv1.Deployment) []string {
	var out []string
	for _, d := range ds {
		out = append(out, d.Name)
	}
	return out
}

// imageUID is the numeric user deploy/Dockerfile's image runs as.
func imageUID(t testing.TB) int64 {
	t.Helper()
	df := readDockerfile(t)
	user := df.stages[len(df.stages)-1].one(t, "USER")
	uid, err := strconv.ParseInt(strings.SplitN(user, ":", 2)[0], 10, 64)
	if err != nil {
		t.Fatalf("Dockerfile USER %q is not numeric", user)
	}
	return uid
}
