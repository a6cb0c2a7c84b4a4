package deploy

import (
	"bufio"
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/json"
	"encoding/pem"
	"errors"
	"fmt"
	"go/ast"
	"go/parser"
	"go/token"
	"io"
	"io/fs"
	"math/big"
	"net"
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
	_ "time/tzdata" // the example configuration names an IANA zone; do not depend on the host's zoneinfo

	"github.com/prometheus/client_golang/prometheus"
	"github.com/stretchr/testify/require"
	"go.yaml.in/yaml/v3"

	"filtrate/config"
	"filtrate/internal/telemetry"
)

// Paths of the artefacts, relative to this package's directory.
const (
	rulesFile      = "prometheus/filtrate.rules.yml"
	dashboardFile  = "grafana/filtrate-dashboard.json"
	unitFile       = "systemd/filtrate.service"
	containerFile  = "container/Containerfile"
	readmeFile     = "README.md"
	kubeDir        = "kubernetes"
	migrateDir     = "kubernetes/migrate"
	secretExample  = "kubernetes/secret.example.yaml"
	configPath     = "/etc/filtrate/filtrate.yml" // the contract: filtrate serve --config /etc/filtrate/filtrate.yml
	mllpPort       = 2575                         // the contract: HL7 v2 over MLLP
	httpPort       = 8080                         // the contract: HTTP
	drainSeconds   = 30                           // the daemon's shutdown budget as the unit and the pods assume it (not yet a contract; see README)
	configMapKey   = "filtrate.yml"
	storeDSNEnv    = "FILTRATE_STORE_DSN"
	appLabelKey    = "app.kubernetes.io/name"
	nonrootUID     = 65532 // the "nonroot" user of gcr.io/distroless/static-debian12:nonroot
	dsPromVariable = "${DS_PROMETHEUS}"
)

// metricLabels lists the metrics the daemon exposes, as the deploy brief
// names them, with their label names. Histograms are listed by their base
// name; the rules and dashboard use the _bucket series.
var metricLabels = map[string][]string{
	"filtrate_ingest_messages_received_total":               {"transport"},
	"filtrate_ingest_messages_acknowledged_total":           {"transport", "code"},
	"filtrate_ingest_processing_seconds":                    {"transport"},
	"filtrate_calc_results_total":                           {"equation"},
	"filtrate_calc_refusals_total":                          {"reason"},
	"filtrate_store_write_seconds":                          {},
	"filtrate_outbox_pending":                               {"destination"},
	"filtrate_outbox_oldest_pending_seconds":                {"destination"},
	"filtrate_outbox_parked":                                {"destination"},
	"filtrate_forward_attempts_total":                       {"destination", "outcome"},
	"filtrate_listener_connections_open":                    {"listener"},
	"filtrate_build_info":                                   {"version", "goversion"},
	"filtrate_config_last_reload_successful":                {},
	"filtrate_config_last_reload_success_timestamp_seconds": {},
}

var histograms = map[string]bool{
	"filtrate_ingest_processing_seconds": true,
	"filtrate_store_write_seconds":       true,
}

// metricRE finds metric names in rules and dashboards.
var metricRE = regexp.MustCompile(`filtrate_[a-z_]+`)

// baseMetric maps a series name (a histogram's _bucket, _sum or _count) to
// the metric it belongs to.
func baseMetric(name string) string {
	for _, suffix := range []string{"_bucket", "_sum", "_count"} {
		if b, ok := strings.CutSuffix(name, suffix); ok && histograms[b] {
			return b
		}
	}
	return name
}

func readFile(t *testing.T, name string) []byte {
	t.Helper()
	data, err := os.ReadFile(name)
	require.NoError(t, err, "reading %s", name)
	return data
}

// yamlDocs decodes every non-empty document of a multi-document YAML file.
func yamlDocs(t *testing.T, name string) []*yaml.Node {
	t.Helper()
	dec := yaml.NewDecoder(bytes.NewReader(readFile(t, name)))
	var docs []*yaml.Node
	for {
		var doc yaml.Node
		err := dec.Decode(&doc)
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err, "parsing %s (document %d)", name, len(docs)+1)
		if len(doc.Content) == 0 || doc.Content[0].ShortTag() == "!!null" {
			continue
		}
		docs = append(docs, &doc)
	}
	return docs
}

// yamlFiles lists the YAML files under dir.
func yamlFiles(t *testing.T, dir string) []string {
	t.Helper()
	var files []string
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if !d.IsDir() && (strings.HasSuffix(p, ".yml") || strings.HasSuffix(p, ".yaml")) {
			files = append(files, p)
		}
		return nil
	})
	require.NoError(t, err)
	return files
}

func TestEveryYAMLFileParses(t *testing.T) {
	files := yamlFiles(t, ".")
	// Common practice: the artefacts this package checks must all be found;
	// an empty walk would make every other check vacuous.
	for _, want := range []string{rulesFile, kubeDir + "/deployment.yaml", kubeDir + "/kustomization.yaml", secretExample} {
		require.Contains(t, files, want)
	}
	for _, f := range files {
		t.Run(f, func(t *testing.T) {
			require.NotEmpty(t, yamlDocs(t, f), "%s holds no YAML document", f)
		})
	}
}

// ---- Kubernetes ----------------------------------------------------------

type objectMeta struct {
	Name      string            `yaml:"name"`
	Namespace string            `yaml:"namespace"`
	Labels    map[string]string `yaml:"labels"`
}

type manifest struct {
	APIVersion string     `yaml:"apiVersion"`
	Kind       string     `yaml:"kind"`
	Metadata   objectMeta `yaml:"metadata"`

	file string
	node *yaml.Node
}

type labelSelector struct {
	MatchLabels map[string]string `yaml:"matchLabels"`
}

type secretKeyRef struct {
	Name string `yaml:"name"`
	Key  string `yaml:"key"`
}

type envVar struct {
	Name      string `yaml:"name"`
	Value     string `yaml:"value"`
	ValueFrom *struct {
		SecretKeyRef *secretKeyRef `yaml:"secretKeyRef"`
	} `yaml:"valueFrom"`
}

type probe struct {
	HTTPGet *struct {
		Path   string `yaml:"path"`
		Port   any    `yaml:"port"`
		Scheme string `yaml:"scheme"`
	} `yaml:"httpGet"`
}

type securityContext struct {
	RunAsNonRoot             *bool  `yaml:"runAsNonRoot"`
	RunAsUser                *int64 `yaml:"runAsUser"`
	ReadOnlyRootFilesystem   *bool  `yaml:"readOnlyRootFilesystem"`
	AllowPrivilegeEscalation *bool  `yaml:"allowPrivilegeEscalation"`
	Capabilities             *struct {
		Drop []string `yaml:"drop"`
	} `yaml:"capabilities"`
	SeccompProfile *struct {
		Type string `yaml:"type"`
	} `yaml:"seccompProfile"`
}

type container struct {
	Name  string   `yaml:"name"`
	Image string   `yaml:"image"`
	Args  []string `yaml:"args"`
	Ports []struct {
		Name          string `yaml:"name"`
		ContainerPort int    `yaml:"containerPort"`
	} `yaml:"ports"`
	Env             []envVar         `yaml:"env"`
	SecurityContext *securityContext `yaml:"securityContext"`
	Resources       struct {
		Requests map[string]string `yaml:"requests"`
		Limits   map[string]string `yaml:"limits"`
	} `yaml:"resources"`
	StartupProbe   *probe `yaml:"startupProbe"`
	LivenessProbe  *probe `yaml:"livenessProbe"`
	ReadinessProbe *probe `yaml:"readinessProbe"`
	Lifecycle      *struct {
		PreStop *struct {
			Sleep *struct {
				Seconds int `yaml:"seconds"`
			} `yaml:"sleep"`
		} `yaml:"preStop"`
	} `yaml:"lifecycle"`
	VolumeMounts []struct {
		Name      string `yaml:"name"`
		MountPath string `yaml:"mountPath"`
		ReadOnly  bool   `yaml:"readOnly"`
	} `yaml:"volumeMounts"`
}

type volume struct {
	Name      string `yaml:"name"`
	ConfigMap *struct {
		Name string `yaml:"name"`
	} `yaml:"configMap"`
	Secret *struct {
		SecretName string `yaml:"secretName"`
		Optional   *bool  `yaml:"optional"`
	} `yaml:"secret"`
}

type podSpec struct {
	ServiceAccountName            string           `yaml:"serviceAccountName"`
	AutomountServiceAccountToken  *bool            `yaml:"automountServiceAccountToken"`
	SecurityContext               *securityContext `yaml:"securityContext"`
	TerminationGracePeriodSeconds *int             `yaml:"terminationGracePeriodSeconds"`
	InitContainers                []container      `yaml:"initContainers"`
	Containers                    []container      `yaml:"containers"`
	Volumes                       []volume         `yaml:"volumes"`
}

type podTemplate struct {
	Metadata objectMeta `yaml:"metadata"`
	Spec     podSpec    `yaml:"spec"`
}

type deployment struct {
	Spec struct {
		Replicas *int          `yaml:"replicas"`
		Selector labelSelector `yaml:"selector"`
		Template podTemplate   `yaml:"template"`
	} `yaml:"spec"`
}

type job struct {
	Spec struct {
		Template podTemplate `yaml:"template"`
	} `yaml:"spec"`
}

type service struct {
	Spec struct {
		Type     string            `yaml:"type"`
		Selector map[string]string `yaml:"selector"`
		Ports    []struct {
			Name       string `yaml:"name"`
			Port       int    `yaml:"port"`
			TargetPort any    `yaml:"targetPort"`
			Protocol   string `yaml:"protocol"`
		} `yaml:"ports"`
	} `yaml:"spec"`
}

type podDisruptionBudget struct {
	Spec struct {
		MinAvailable   any           `yaml:"minAvailable"`
		MaxUnavailable any           `yaml:"maxUnavailable"`
		Selector       labelSelector `yaml:"selector"`
	} `yaml:"spec"`
}

type networkPolicy struct {
	Spec struct {
		PodSelector labelSelector `yaml:"podSelector"`
		PolicyTypes []string      `yaml:"policyTypes"`
		Ingress     []struct {
			From  []any `yaml:"from"`
			Ports []struct {
				Port     any    `yaml:"port"`
				Protocol string `yaml:"protocol"`
			} `yaml:"ports"`
		} `yaml:"ingress"`
	} `yaml:"spec"`
}

type configMap struct {
	Data map[string]string `yaml:"data"`
}

type secret struct {
	StringData map[string]string `yaml:"stringData"`
	Data       map[string]string `yaml:"data"`
}

type kustomization struct {
	Resources []string `yaml:"resources"`
	Images    []struct {
		Name    string `yaml:"name"`
		NewName string `yaml:"newName"`
		NewTag  string `yaml:"newTag"`
	} `yaml:"images"`
}

// manifests decodes the Kubernetes objects of the given files.
func manifests(t *testing.T, files ...string) []manifest {
	t.Helper()
	var out []manifest
	for _, f := range files {
		for _, doc := range yamlDocs(t, f) {
			var m manifest
			require.NoError(t, doc.Decode(&m), "%s", f)
			m.file, m.node = f, doc
			out = append(out, m)
		}
	}
	return out
}

// decodeAs decodes a manifest into its typed form.
func decodeAs[T any](t *testing.T, m manifest) T {
	t.Helper()
	var v T
	require.NoError(t, m.node.Decode(&v), "%s: %s %s", m.file, m.Kind, m.Metadata.Name)
	return v
}

// find returns the only object of kind (and name, when not empty).
func find(t *testing.T, ms []manifest, kind, name string) manifest {
	t.Helper()
	var found []manifest
	for _, m := range ms {
		if m.Kind == kind && (name == "" || m.Metadata.Name == name) {
			found = append(found, m)
		}
	}
	require.Len(t, found, 1, "want exactly one %s %q", kind, name)
	return found[0]
}

// kube holds the parsed Kubernetes artefacts that the checks below share.
type kube struct {
	applied    []manifest // what kustomization.yaml applies
	deployment deployment
	pod        podTemplate
	server     container
	configText string
	secrets    map[string]map[string]string // secret.example.yaml: name → key → value
}

func loadKube(t *testing.T) kube {
	t.Helper()
	var k kube
	var kz kustomization
	docs := yamlDocs(t, filepath.Join(kubeDir, "kustomization.yaml"))
	require.Len(t, docs, 1)
	require.NoError(t, docs[0].Decode(&kz))
	var files []string
	for _, r := range kz.Resources {
		files = append(files, filepath.Join(kubeDir, r))
	}
	k.applied = manifests(t, files...)
	k.deployment = decodeAs[deployment](t, find(t, k.applied, "Deployment", "filtrate"))
	k.pod = k.deployment.Spec.Template
	require.NotEmpty(t, k.pod.Spec.Containers)
	k.server = k.pod.Spec.Containers[0]
	cm := decodeAs[configMap](t, find(t, k.applied, "ConfigMap", configMapName(t, k.pod)))
	k.configText = cm.Data[configMapKey]
	require.NotEmpty(t, k.configText, "the ConfigMap holds %s", configMapKey)
	k.secrets = map[string]map[string]string{}
	for _, m := range manifests(t, secretExample) {
		require.Equal(t, "Secret", m.Kind, "%s holds Secrets only", secretExample)
		s := decodeAs[secret](t, m)
		require.Empty(t, s.Data, "the example uses stringData, readable placeholders")
		k.secrets[m.Metadata.Name] = s.StringData
	}
	return k
}

func configMapName(t *testing.T, pod podTemplate) string {
	t.Helper()
	for _, v := range pod.Spec.Volumes {
		if v.ConfigMap != nil {
			return v.ConfigMap.Name
		}
	}
	t.Fatal("the pod mounts no ConfigMap")
	return ""
}

func boolValue(b *bool) bool { return b != nil && *b }

func TestKustomizationListsEveryManifest(t *testing.T) {
	entries, err := os.ReadDir(kubeDir)
	require.NoError(t, err)
	var onDisk []string
	for _, e := range entries {
		n := e.Name()
		if e.IsDir() || !strings.HasSuffix(n, ".yaml") || n == "kustomization.yaml" || n == path.Base(secretExample) {
			continue
		}
		onDisk = append(onDisk, n)
	}
	var kz kustomization
	require.NoError(t, yamlDocs(t, filepath.Join(kubeDir, "kustomization.yaml"))[0].Decode(&kz))
	require.ElementsMatch(t, onDisk, kz.Resources, "kustomization.yaml lists every manifest except the secret example")
	require.NotContains(t, kz.Resources, path.Base(secretExample), "the example Secret must never be applied")

	var mz kustomization
	require.NoError(t, yamlDocs(t, filepath.Join(migrateDir, "kustomization.yaml"))[0].Decode(&mz))
	require.Equal(t, []string{"job.yaml"}, mz.Resources)
	require.Equal(t, kz.Images, mz.Images, "the migration Job and the Deployment use the same image")
}

func TestManifestsAreNamespaceAgnostic(t *testing.T) {
	var files []string
	for _, f := range yamlFiles(t, kubeDir) {
		if path.Base(f) != "kustomization.yaml" {
			files = append(files, f)
		}
	}
	ms := manifests(t, files...)
	require.NotEmpty(t, ms)
	for _, m := range ms {
		require.NotEmpty(t, m.APIVersion, "%s", m.file)
		require.NotEmpty(t, m.Kind, "%s", m.file)
		require.NotEmpty(t, m.Metadata.Name, "%s: %s", m.file, m.Kind)
		require.Empty(t, m.Metadata.Namespace, "%s: %s %s sets a namespace", m.file, m.Kind, m.Metadata.Name)
		require.NotEqual(t, "Namespace", m.Kind, "%s", m.file)
	}
	for _, f := range []string{filepath.Join(kubeDir, "kustomization.yaml"), filepath.Join(migrateDir, "kustomization.yaml")} {
		var kz map[string]any
		require.NoError(t, yamlDocs(t, f)[0].Decode(&kz))
		require.NotContains(t, kz, "namespace", "%s", f)
	}
}

// checkPodSecurity checks the pod- and container-level hardening.
func checkPodSecurity(t *testing.T, what string, pod podTemplate) {
	t.Helper()
	psc := pod.Spec.SecurityContext
	require.NotNil(t, psc, "%s: pod securityContext", what)
	require.True(t, boolValue(psc.RunAsNonRoot), "%s: runAsNonRoot", what)
	// The kubelet cannot check the image's user name "nonroot" against
	// runAsNonRoot, so the numeric ID must be given.
	require.NotNil(t, psc.RunAsUser, "%s: runAsUser", what)
	require.EqualValues(t, nonrootUID, *psc.RunAsUser, "%s: runAsUser", what)
	require.NotNil(t, psc.SeccompProfile, "%s: seccompProfile", what)
	require.Equal(t, "RuntimeDefault", psc.SeccompProfile.Type, "%s", what)
	require.False(t, boolValue(pod.Spec.AutomountServiceAccountToken), "%s: no API token", what)
	all := append(slices.Clone(pod.Spec.InitContainers), pod.Spec.Containers...)
	for _, c := range all {
		sc := c.SecurityContext
		require.NotNil(t, sc, "%s/%s: securityContext", what, c.Name)
		require.True(t, boolValue(sc.RunAsNonRoot), "%s/%s: runAsNonRoot", what, c.Name)
		require.True(t, boolValue(sc.ReadOnlyRootFilesystem), "%s/%s: readOnlyRootFilesystem", what, c.Name)
		require.NotNil(t, sc.AllowPrivilegeEscalation, "%s/%s", what, c.Name)
		require.False(t, *sc.AllowPrivilegeEscalation, "%s/%s: allowPrivilegeEscalation", what, c.Name)
		require.NotNil(t, sc.Capabilities, "%s/%s: capabilities", what, c.Name)
		require.Contains(t, sc.Capabilities.Drop, "ALL", "%s/%s: drop ALL capabilities", what, c.Name)
		require.NotNil(t, sc.SeccompProfile, "%s/%s", what, c.Name)
		require.Equal(t, "RuntimeDefault", sc.SeccompProfile.Type, "%s/%s", what, c.Name)
		for _, r := range []string{"cpu", "memory"} {
			require.NotEmpty(t, c.Resources.Requests[r], "%s/%s: requests.%s", what, c.Name, r)
			require.NotEmpty(t, c.Resources.Limits[r], "%s/%s: limits.%s", what, c.Name, r)
		}
	}
}

// envFromSecrets returns a container's variables set from Secrets.
func envFromSecrets(c container) map[string]secretKeyRef {
	out := map[string]secretKeyRef{}
	for _, e := range c.Env {
		if e.ValueFrom != nil && e.ValueFrom.SecretKeyRef != nil {
			out[e.Name] = *e.ValueFrom.SecretKeyRef
		}
	}
	return out
}

// envRefRE finds ${NAME} references, as config expands them.
var envRefRE = regexp.MustCompile(`\$\{([A-Za-z_][A-Za-z0-9_]*)\}`)

// configEnv lists the environment variables a configuration needs: every
// ${NAME} and every http.auth.bearer_token_env entry.
func configEnv(t *testing.T, text string) []string {
	t.Helper()
	var names []string
	for _, m := range envRefRE.FindAllStringSubmatch(text, -1) {
		names = append(names, m[1])
	}
	var c struct {
		HTTP struct {
			Auth struct {
				BearerTokenEnv []string `yaml:"bearer_token_env"`
			} `yaml:"auth"`
		} `yaml:"http"`
	}
	require.NoError(t, yaml.Unmarshal([]byte(text), &c))
	names = append(names, c.HTTP.Auth.BearerTokenEnv...)
	slices.Sort(names)
	return slices.Compact(names)
}

// checkLoadsConfig checks that a container running filtrate with the
// configuration has what loading it needs: the file at configPath, every
// environment variable from an existing Secret key, every Secret volume.
func checkLoadsConfig(t *testing.T, k kube, what string, pod podTemplate, c container) {
	t.Helper()
	mounts := map[string]string{}
	for _, m := range c.VolumeMounts {
		mounts[m.Name] = m.MountPath
		require.True(t, m.ReadOnly || m.MountPath == "/tmp", "%s/%s: mount %s is read-only", what, c.Name, m.MountPath)
	}
	var haveConfig bool
	for _, v := range pod.Spec.Volumes {
		mp, mounted := mounts[v.Name]
		switch {
		case v.ConfigMap != nil && mounted:
			require.Equal(t, path.Dir(configPath), mp, "%s/%s: configuration directory", what, c.Name)
			haveConfig = true
		case v.Secret != nil && mounted:
			require.Contains(t, k.secrets, v.Secret.SecretName, "%s: Secret %q is described in %s", what, v.Secret.SecretName, secretExample)
		}
	}
	require.True(t, haveConfig, "%s/%s mounts the ConfigMap", what, c.Name)
	env := envFromSecrets(c)
	for _, name := range configEnv(t, k.configText) {
		ref, ok := env[name]
		require.True(t, ok, "%s/%s: the configuration needs %s, which the container does not set from a Secret", what, c.Name, name)
		require.Contains(t, k.secrets[ref.Name], ref.Key, "%s/%s: %s comes from Secret %q key %q, not in %s", what, c.Name, name, ref.Name, ref.Key, secretExample)
	}
}

func TestDeployment(t *testing.T) {
	k := loadKube(t)
	d := k.deployment
	require.NotNil(t, d.Spec.Replicas)
	require.GreaterOrEqual(t, *d.Spec.Replicas, 2, "replicas sharing PostgreSQL")
	require.NotEmpty(t, d.Spec.Selector.MatchLabels)
	for key, v := range d.Spec.Selector.MatchLabels {
		require.Equal(t, v, k.pod.Metadata.Labels[key], "the selector matches the pod template")
	}
	checkPodSecurity(t, "Deployment", k.pod)

	find(t, k.applied, "ServiceAccount", k.pod.Spec.ServiceAccountName)

	s := k.server
	require.Equal(t, []string{"serve", "--config", configPath}, s.Args)
	ports := map[string]int{}
	for _, p := range s.Ports {
		ports[p.Name] = p.ContainerPort
	}
	require.Equal(t, map[string]int{"hl7v2": mllpPort, "http": httpPort}, ports)

	// Probes: /healthz for start-up and liveness, /readyz for readiness, on
	// the HTTP port, with HTTPS exactly when the configuration enables TLS.
	var cfg struct {
		HTTP struct {
			TLS struct {
				CertFile string `yaml:"cert_file"`
			} `yaml:"tls"`
		} `yaml:"http"`
	}
	require.NoError(t, yaml.Unmarshal([]byte(k.configText), &cfg))
	wantScheme := ""
	if cfg.HTTP.TLS.CertFile != "" {
		wantScheme = "HTTPS"
	}
	for _, tc := range []struct {
		name string
		p    *probe
		path string
	}{
		{"startupProbe", s.StartupProbe, "/healthz"},
		{"livenessProbe", s.LivenessProbe, "/healthz"},
		{"readinessProbe", s.ReadinessProbe, "/readyz"},
	} {
		require.NotNil(t, tc.p, tc.name)
		require.NotNil(t, tc.p.HTTPGet, tc.name)
		require.Equal(t, tc.path, tc.p.HTTPGet.Path, tc.name)
		port := tc.p.HTTPGet.Port
		if name, ok := port.(string); ok {
			port = ports[name]
		}
		require.Equal(t, httpPort, port, "%s port", tc.name)
		require.Equal(t, wantScheme, strings.ToUpper(tc.p.HTTPGet.Scheme), "%s scheme", tc.name)
	}

	// Draining: the grace period covers the preStop pause and the drain
	// the systemd unit allows (TimeoutStopSec).
	require.NotNil(t, s.Lifecycle)
	require.NotNil(t, s.Lifecycle.PreStop)
	require.NotNil(t, s.Lifecycle.PreStop.Sleep, "preStop sleep (the image has no shell)")
	preStop := s.Lifecycle.PreStop.Sleep.Seconds
	require.Positive(t, preStop)
	require.NotNil(t, k.pod.Spec.TerminationGracePeriodSeconds)
	unitStop := unitStopSeconds(t)
	require.GreaterOrEqual(t, *k.pod.Spec.TerminationGracePeriodSeconds, preStop+unitStop,
		"terminationGracePeriodSeconds covers preStop (%d s) and the drain (%d s)", preStop, unitStop)

	// The schema is migrated before the server starts.
	var migrate []container
	for _, c := range k.pod.Spec.InitContainers {
		if slices.Equal(c.Args, []string{"store", "migrate", "--config", configPath}) {
			migrate = append(migrate, c)
		}
	}
	require.Len(t, migrate, 1, "one init container runs filtrate store migrate")
	require.Equal(t, s.Image, migrate[0].Image, "migration and server use one image")

	for _, c := range append(slices.Clone(k.pod.Spec.InitContainers), s) {
		checkLoadsConfig(t, k, "Deployment", k.pod, c)
	}
	require.Contains(t, envFromSecrets(s), storeDSNEnv)
}

func TestMigrationJob(t *testing.T) {
	k := loadKube(t)
	ms := manifests(t, filepath.Join(migrateDir, "job.yaml"))
	j := decodeAs[job](t, find(t, ms, "Job", ""))
	pod := j.Spec.Template
	checkPodSecurity(t, "Job", pod)
	require.Len(t, pod.Spec.Containers, 1)
	c := pod.Spec.Containers[0]
	require.Equal(t, []string{"store", "migrate", "--config", configPath}, c.Args)
	require.Equal(t, k.server.Image, c.Image)
	checkLoadsConfig(t, k, "Job", pod, c)
	require.Equal(t, configMapName(t, k.pod), configMapName(t, pod))
}

func TestServicePDBAndNetworkPolicy(t *testing.T) {
	k := loadKube(t)
	podLabels := k.pod.Metadata.Labels
	selects := func(sel map[string]string) bool {
		if len(sel) == 0 {
			return false
		}
		for key, v := range sel {
			if podLabels[key] != v {
				return false
			}
		}
		return true
	}
	named := map[string]int{}
	for _, p := range k.server.Ports {
		named[p.Name] = p.ContainerPort
	}

	svc := decodeAs[service](t, find(t, k.applied, "Service", ""))
	require.Equal(t, "ClusterIP", svc.Spec.Type)
	require.True(t, selects(svc.Spec.Selector), "the Service selects the pods")
	got := map[int]int{}
	for _, p := range svc.Spec.Ports {
		target := p.TargetPort
		if name, ok := target.(string); ok {
			target = named[name]
		}
		got[p.Port] = target.(int)
		require.Equal(t, "TCP", p.Protocol)
	}
	require.Equal(t, map[int]int{mllpPort: mllpPort, httpPort: httpPort}, got)

	pdb := decodeAs[podDisruptionBudget](t, find(t, k.applied, "PodDisruptionBudget", ""))
	require.Equal(t, 1, pdb.Spec.MinAvailable, "PodDisruptionBudget minAvailable")
	require.Nil(t, pdb.Spec.MaxUnavailable)
	require.Less(t, 1, *k.deployment.Spec.Replicas, "minAvailable must leave room for one disruption")
	require.Equal(t, k.deployment.Spec.Selector.MatchLabels, pdb.Spec.Selector.MatchLabels)

	np := decodeAs[networkPolicy](t, find(t, k.applied, "NetworkPolicy", ""))
	require.True(t, selects(np.Spec.PodSelector.MatchLabels), "the NetworkPolicy selects the pods")
	require.Contains(t, np.Spec.PolicyTypes, "Ingress")
	var allowed []int
	for _, rule := range np.Spec.Ingress {
		require.NotEmpty(t, rule.Ports, "an ingress rule without ports would admit every port")
		for _, p := range rule.Ports {
			require.Equal(t, "TCP", p.Protocol)
			allowed = append(allowed, p.Port.(int))
		}
	}
	slices.Sort(allowed)
	require.Equal(t, []int{mllpPort, httpPort}, slices.Compact(allowed))
}

func TestSecretExampleHoldsPlaceholdersOnly(t *testing.T) {
	k := loadKube(t)
	require.NotEmpty(t, k.secrets)
	for name, kv := range k.secrets {
		require.NotEmpty(t, kv, "Secret %s", name)
		for key, v := range kv {
			require.Contains(t, v, "CHANGE-ME", "Secret %s key %s must be a placeholder", name, key)
		}
	}
}

// writePKI writes a self-signed certificate and its key under dir for every
// file name: *.key gets the key, anything else the certificate.
func writePKI(t *testing.T, dir string, names []string) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	require.NoError(t, err)
	tmpl := &x509.Certificate{
		SerialNumber:          big.NewInt(1),
		Subject:               pkix.Name{CommonName: "filtrate.test"},
		DNSNames:              []string{"filtrate.test"},
		NotBefore:             time.Now().Add(-time.Hour),
		NotAfter:              time.Now().Add(time.Hour),
		IsCA:                  true,
		BasicConstraintsValid: true,
		KeyUsage:              x509.KeyUsageDigitalSignature | x509.KeyUsageCertSign,
		ExtKeyUsage:           []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth, x509.ExtKeyUsageClientAuth},
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	require.NoError(t, err)
	keyDER, err := x509.MarshalPKCS8PrivateKey(key)
	require.NoError(t, err)
	certPEM := pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der})
	keyPEM := pem.EncodeToMemory(&pem.Block{Type: "PRIVATE KEY", Bytes: keyDER})
	for _, n := range names {
		data := certPEM
		if strings.HasSuffix(n, ".key") {
			data = keyPEM
		}
		require.NoError(t, os.WriteFile(filepath.Join(dir, n), data, 0o600))
	}
}

// TestConfigMapLoads loads the ConfigMap's filtrate.yml with the daemon's
// own loader, as the pods would: environment from the example Secret, TLS
// files from the example TLS Secret's keys (generated here).
func TestConfigMapLoads(t *testing.T) {
	k := loadKube(t)
	text := k.configText

	// Files under a Secret mount must be keys of that Secret.
	mounts := map[string]string{} // mount path → Secret name
	for _, v := range k.pod.Spec.Volumes {
		if v.Secret == nil {
			continue
		}
		for _, m := range k.server.VolumeMounts {
			if m.Name == v.Name {
				mounts[m.MountPath] = v.Secret.SecretName
			}
		}
	}
	require.NotEmpty(t, mounts)
	for mp, name := range mounts {
		re := regexp.MustCompile(regexp.QuoteMeta(mp+"/") + `([A-Za-z0-9._-]+)`)
		var files []string
		for _, m := range re.FindAllStringSubmatch(text, -1) {
			require.Contains(t, k.secrets[name], m[1], "%s%s: not a key of Secret %q in %s", mp+"/", m[1], name, secretExample)
			files = append(files, m[1])
		}
		dir := t.TempDir()
		writePKI(t, dir, files)
		text = strings.ReplaceAll(text, mp+"/", dir+"/")
	}
	env := envFromSecrets(k.server)
	for _, name := range configEnv(t, k.configText) {
		ref := env[name]
		t.Setenv(name, k.secrets[ref.Name][ref.Key])
	}

	cfg, err := config.Load([]byte(text), "filtrate.yml")
	require.NoError(t, err, "the ConfigMap's configuration must load")
	require.Empty(t, cfg.Warnings(), "the example configuration is secure: no warnings")

	kind, _, err := config.ParseStore(cfg.Store)
	require.NoError(t, err)
	require.Equal(t, config.StorePostgres, kind, "replicas share PostgreSQL")
	require.Contains(t, k.configText, "store: ${"+storeDSNEnv+"}", "the DSN stays in the Secret")
	require.NotEmpty(t, cfg.HL7v2.Forward, "hl7v2.forward")
	_, err = cfg.Policy()
	require.NoError(t, err, "the configured policy resolves")
	var raw struct {
		Policy struct {
			Preset string `yaml:"preset"`
		} `yaml:"policy"`
	}
	require.NoError(t, yaml.Unmarshal([]byte(k.configText), &raw))
	require.NotEmpty(t, raw.Policy.Preset, "policy.preset is stated, not left to the default")
	for _, tc := range []struct {
		key, listen string
		port        int
	}{
		{"http.listen", cfg.HTTP.Listen, httpPort},
		{"hl7v2.listen", cfg.HL7v2.Listen, mllpPort},
	} {
		host, port, err := net.SplitHostPort(tc.listen)
		require.NoError(t, err, tc.key)
		require.Empty(t, host, "%s: all interfaces, so the Service reaches the pod", tc.key)
		require.Equal(t, strconv.Itoa(tc.port), port, tc.key)
	}
}

// ---- Prometheus rules ----------------------------------------------------

type rule struct {
	Alert       string            `yaml:"alert"`
	Record      string            `yaml:"record"`
	Expr        string            `yaml:"expr"`
	For         string            `yaml:"for"`
	Labels      map[string]string `yaml:"labels"`
	Annotations map[string]string `yaml:"annotations"`
}

type ruleGroup struct {
	Name     string `yaml:"name"`
	Interval string `yaml:"interval"`
	Rules    []rule `yaml:"rules"`
}

func loadRules(t *testing.T) []ruleGroup {
	t.Helper()
	var f struct {
		Groups []ruleGroup `yaml:"groups"`
	}
	dec := yaml.NewDecoder(bytes.NewReader(readFile(t, rulesFile)))
	dec.KnownFields(true) // a misspelt key (annotation:) would silently drop data
	require.NoError(t, dec.Decode(&f))
	return f.Groups
}

// promDurationRE matches a Prometheus duration such as 10m or 1h30m.
var promDurationRE = regexp.MustCompile(`^([0-9]+(ms|s|m|h|d|w|y))+$`)

func TestAlertRules(t *testing.T) {
	groups := loadRules(t)
	var names []string
	for _, g := range groups {
		names = append(names, g.Name)
	}
	require.ElementsMatch(t, []string{"filtrate.delivery", "filtrate.quality", "filtrate.traffic", "filtrate.operations"}, names)

	readme := string(readFile(t, readmeFile))
	seen := map[string]bool{}
	for _, g := range groups {
		require.NotEmpty(t, g.Rules, g.Name)
		for _, r := range g.Rules {
			require.NotEmpty(t, r.Alert, "%s: only alerting rules here", g.Name)
			require.Empty(t, r.Record, r.Alert)
			require.False(t, seen[r.Alert], "duplicate alert %s", r.Alert)
			seen[r.Alert] = true
			require.NotEmpty(t, strings.TrimSpace(r.Expr), "%s: expr", r.Alert)
			if r.For != "" {
				require.Regexp(t, promDurationRE, r.For, "%s: for", r.Alert)
			}
			require.Contains(t, []string{"critical", "warning"}, r.Labels["severity"], "%s: labels.severity", r.Alert)
			require.NotEmpty(t, r.Annotations["summary"], "%s: annotations.summary", r.Alert)
			require.NotEmpty(t, r.Annotations["description"], "%s: annotations.description", r.Alert)
			anchor := strings.ToLower(r.Alert)
			require.Equal(t, "deploy/"+readmeFile+"#"+anchor, r.Annotations["runbook"], "%s: runbook annotation", r.Alert)
			require.Contains(t, readme, "\n#### "+r.Alert+"\n", "%s: runbook section in %s", r.Alert, readmeFile)
			require.Equal(t, strings.Count(r.Expr, "("), strings.Count(r.Expr, ")"), "%s: balanced parentheses", r.Alert)
		}
	}

	// What each group must watch: every row is matched by one alert of the
	// group whose expression contains all the fragments (and, when given,
	// whose for: equals forDur).
	for _, tc := range []struct {
		group, what string
		fragments   []string
		forDur      string
	}{
		{"filtrate.delivery", "outbox backing up", []string{"filtrate_outbox_pending", ">"}, "10m"},
		{"filtrate.delivery", "oldest pending over 15 minutes", []string{"filtrate_outbox_oldest_pending_seconds", "> 900"}, ""},
		{"filtrate.delivery", "parked messages", []string{"filtrate_outbox_parked", "> 0"}, ""},
		{"filtrate.quality", "refusal rate against a day earlier", []string{"rate(filtrate_calc_refusals_total", "rate(filtrate_calc_results_total", "offset 1d"}, ""},
		{"filtrate.traffic", "no traffic in working hours", []string{"rate(filtrate_ingest_messages_received_total", "[30m]", "== 0", "hour()", "day_of_week()"}, ""},
		{"filtrate.operations", "reload failed", []string{"filtrate_config_last_reload_successful", "== 0"}, ""},
		{"filtrate.operations", "instance down", []string{`up{job="filtrate"} == 0`}, ""},
		{"filtrate.operations", "store write latency p99", []string{"histogram_quantile(0.99", "filtrate_store_write_seconds_bucket"}, ""},
		{"filtrate.operations", "AE/AR rising", []string{"filtrate_ingest_messages_acknowledged_total", `code=~"AE|AR"`}, ""},
	} {
		t.Run(tc.what, func(t *testing.T) {
			var g *ruleGroup
			for i := range groups {
				if groups[i].Name == tc.group {
					g = &groups[i]
				}
			}
			require.NotNil(t, g, tc.group)
			found := slices.ContainsFunc(g.Rules, func(r rule) bool {
				for _, f := range tc.fragments {
					if !strings.Contains(r.Expr, f) {
						return false
					}
				}
				return tc.forDur == "" || r.For == tc.forDur
			})
			require.True(t, found, "%s: no alert in %s with %q (for %q)", tc.what, tc.group, tc.fragments, tc.forDur)
		})
	}
}

// matcherRE finds a metric name with its label matchers.
var matcherRE = regexp.MustCompile(`(filtrate_[a-z_]+)\{([^}]*)\}`)

// checkMetricNames checks every filtrate_* name in text against
// metricLabels, and the label names of every matcher. It returns the
// metrics found.
func checkMetricNames(t *testing.T, what, text string) map[string]bool {
	t.Helper()
	found := map[string]bool{}
	for _, name := range metricRE.FindAllString(text, -1) {
		base := baseMetric(name)
		_, ok := metricLabels[base]
		require.True(t, ok, "%s: unknown metric %s", what, name)
		found[base] = true
	}
	for _, m := range matcherRE.FindAllStringSubmatch(text, -1) {
		base := baseMetric(m[1])
		allowed := append([]string{"job", "instance"}, metricLabels[base]...)
		if base != m[1] && strings.HasSuffix(m[1], "_bucket") {
			allowed = append(allowed, "le")
		}
		for _, matcher := range strings.Split(m[2], ",") {
			matcher = strings.TrimSpace(matcher)
			if matcher == "" {
				continue
			}
			i := strings.IndexAny(matcher, "=!")
			require.Positive(t, i, "%s: matcher %q", what, matcher)
			require.Contains(t, allowed, strings.TrimSpace(matcher[:i]), "%s: %s has no such label (matcher %q)", what, m[1], matcher)
		}
	}
	require.NotEmpty(t, found, "%s: no metric found; the check would be vacuous", what)
	return found
}

func TestMetricNamesAreKnown(t *testing.T) {
	checkMetricNames(t, rulesFile, string(readFile(t, rulesFile)))
	used := checkMetricNames(t, dashboardFile, string(readFile(t, dashboardFile)))
	var missing []string
	for name := range metricLabels {
		if !used[name] {
			missing = append(missing, name)
		}
	}
	require.Empty(t, missing, "metrics without a dashboard panel")
}

// TestMetricListMatchesDaemon checks the list above against the metrics
// the daemon registers (internal/telemetry), so a renamed metric cannot
// leave the rules and dashboard silently empty.
func TestMetricListMatchesDaemon(t *testing.T) {
	reg := prometheus.NewPedanticRegistry()
	telemetry.New(reg, "test", []string{"ckd-epi-2021-cr"}, []string{"unit-unknown"})
	reg.MustRegister(telemetry.NewOutboxCollector(func(context.Context) ([]telemetry.OutboxStat, error) {
		return nil, nil
	}))
	mfs, err := reg.Gather()
	require.NoError(t, err)
	exposed := map[string][]string{}
	for _, mf := range mfs {
		var labels []string
		for _, lp := range mf.GetMetric()[0].GetLabel() {
			labels = append(labels, lp.GetName())
		}
		exposed[mf.GetName()] = labels
	}
	for name, labels := range metricLabels {
		got, ok := exposed[name]
		require.True(t, ok, "the daemon does not expose %s", name)
		require.ElementsMatch(t, labels, got, "labels of %s", name)
	}
}

func TestPromtoolCheckRules(t *testing.T) {
	promtool, err := exec.LookPath("promtool")
	if err != nil {
		t.Skip("promtool is not installed (optional)")
	}
	out, err := exec.CommandContext(t.Context(), promtool, "check", "rules", rulesFile).CombinedOutput()
	require.NoError(t, err, "promtool check rules:\n%s", out)
}

// ---- Grafana -------------------------------------------------------------

type panel struct {
	ID          int    `json:"id"`
	Type        string `json:"type"`
	Title       string `json:"title"`
	Description string `json:"description"`
	GridPos     struct {
		H, W, X, Y int
	} `json:"gridPos"`
	Datasource *struct {
		Type string `json:"type"`
		UID  string `json:"uid"`
	} `json:"datasource"`
	Targets []struct {
		Expr       string `json:"expr"`
		RefID      string `json:"refId"`
		Datasource *struct {
			UID string `json:"uid"`
		} `json:"datasource"`
	} `json:"targets"`
	Panels []panel `json:"panels"`
}

type dashboard struct {
	Title         string  `json:"title"`
	UID           string  `json:"uid"`
	SchemaVersion int     `json:"schemaVersion"`
	Panels        []panel `json:"panels"`
	Templating    struct {
		List []struct {
			Name  string `json:"name"`
			Type  string `json:"type"`
			Query any    `json:"query"`
		} `json:"list"`
	} `json:"templating"`
}

func TestDashboard(t *testing.T) {
	var d dashboard
	require.NoError(t, json.Unmarshal(readFile(t, dashboardFile), &d))
	// From memory: schemaVersion 36 (Grafana 9) is where panels and targets
	// reference data sources as {type, uid} objects, as checked below.
	require.GreaterOrEqual(t, d.SchemaVersion, 36, "schemaVersion")
	require.NotEmpty(t, d.Title)
	require.NotEmpty(t, d.UID)

	vars := map[string]string{}
	for _, v := range d.Templating.List {
		vars[v.Name] = v.Type
	}
	require.Equal(t, "datasource", vars["DS_PROMETHEUS"], "a Prometheus data source variable")
	require.Equal(t, "query", vars["instance"], "an instance variable")

	// Every Prometheus data source reference anywhere (panels, targets,
	// annotations, variables) is the variable, so the import picks it.
	var tree any
	require.NoError(t, json.Unmarshal(readFile(t, dashboardFile), &tree))
	refs := 0
	var walk func(v any)
	walk = func(v any) {
		switch v := v.(type) {
		case map[string]any:
			if ds, ok := v["datasource"].(map[string]any); ok && ds["type"] == "prometheus" {
				require.Equal(t, dsPromVariable, ds["uid"], "a Prometheus data source not taken from the variable")
				refs++
			}
			for _, c := range v {
				walk(c)
			}
		case []any:
			for _, c := range v {
				walk(c)
			}
		}
	}
	walk(tree)
	require.Positive(t, refs)

	var all []panel
	for _, p := range d.Panels {
		all = append(all, p)
		all = append(all, p.Panels...) // collapsed rows nest their panels
	}
	ids := map[int]bool{}
	titles := map[string]bool{}
	type rect struct{ x, y, w, h int }
	var rects []rect
	for _, p := range all {
		require.Positive(t, p.ID, p.Title)
		require.False(t, ids[p.ID], "duplicate panel id %d", p.ID)
		ids[p.ID] = true
		require.NotEmpty(t, p.Title, "panel %d", p.ID)
		g := p.GridPos
		require.True(t, g.W > 0 && g.H > 0 && g.X >= 0 && g.X+g.W <= 24, "%s: gridPos %+v", p.Title, g)
		r := rect{g.X, g.Y, g.W, g.H}
		for _, o := range rects {
			overlap := r.x < o.x+o.w && o.x < r.x+r.w && r.y < o.y+o.h && o.y < r.y+r.h
			require.False(t, overlap, "%s overlaps another panel", p.Title)
		}
		rects = append(rects, r)
		if p.Type == "row" {
			continue
		}
		titles[p.Title] = true
		require.NotNil(t, p.Datasource, p.Title)
		require.Equal(t, dsPromVariable, p.Datasource.UID, "%s: data source", p.Title)
		require.NotEmpty(t, p.Targets, p.Title)
		for _, tg := range p.Targets {
			require.NotEmpty(t, tg.Expr, "%s: target %s", p.Title, tg.RefID)
			require.Contains(t, tg.Expr, `instance=~"$instance"`, "%s: honours the instance variable", p.Title)
			require.NotNil(t, tg.Datasource, p.Title)
			require.Equal(t, dsPromVariable, tg.Datasource.UID, p.Title)
			require.Equal(t, strings.Count(tg.Expr, "("), strings.Count(tg.Expr, ")"), "%s: balanced parentheses", p.Title)
		}
	}
	for _, want := range []string{
		"Messages received",
		"Acknowledgements by code",
		"eGFR values by equation",
		"Refusals by reason",
		"Time to acknowledge",
		"Store write time",
		"Reports waiting for delivery",
		"Oldest waiting report",
		"Parked reports",
		"Delivery attempts by outcome",
		"Open connections",
		"Configuration reload status",
		"Versions running",
	} {
		require.True(t, titles[want], "panel %q", want)
	}
}

// ---- systemd -------------------------------------------------------------

// unitLine is one key=value line of a unit file.
type unitLine struct {
	section, key, value string
	commented           bool // the line's block (up to a blank line) starts with a comment
}

func parseUnit(t *testing.T) []unitLine {
	t.Helper()
	var (
		lines     []unitLine
		section   string
		commented bool
	)
	sc := bufio.NewScanner(bytes.NewReader(readFile(t, unitFile)))
	for sc.Scan() {
		l := strings.TrimSpace(sc.Text())
		switch {
		case l == "":
			commented = false
		case strings.HasPrefix(l, "#") || strings.HasPrefix(l, ";"):
			commented = true
		case strings.HasPrefix(l, "[") && strings.HasSuffix(l, "]"):
			section, commented = strings.Trim(l, "[]"), false
		default:
			key, value, ok := strings.Cut(l, "=")
			require.True(t, ok, "%s: not key=value: %q", unitFile, l)
			lines = append(lines, unitLine{section, strings.TrimSpace(key), strings.TrimSpace(value), commented})
		}
	}
	require.NoError(t, sc.Err())
	return lines
}

func unitValues(lines []unitLine, section, key string) []string {
	var out []string
	for _, l := range lines {
		if l.section == section && l.key == key {
			out = append(out, l.value)
		}
	}
	return out
}

// unitStopSeconds returns TimeoutStopSec in seconds.
func unitStopSeconds(t *testing.T) int {
	t.Helper()
	v := unitValues(parseUnit(t), "Service", "TimeoutStopSec")
	require.Len(t, v, 1, "TimeoutStopSec")
	d, err := time.ParseDuration(v[0])
	require.NoError(t, err, "TimeoutStopSec=%s", v[0])
	return int(d.Seconds())
}

func TestSystemdUnit(t *testing.T) {
	lines := parseUnit(t)
	one := func(key string) string {
		t.Helper()
		v := unitValues(lines, "Service", key)
		require.Len(t, v, 1, "[Service] %s", key)
		return v[0]
	}
	yes := func(v string) bool { return slices.Contains([]string{"yes", "true", "1", "on"}, v) }

	// Hardening keys: each set as required and each commented.
	hardening := []struct {
		key string
		ok  func(string) bool
	}{
		{"ProtectSystem", func(v string) bool { return v == "strict" }},
		{"ProtectHome", func(v string) bool { return yes(v) || v == "read-only" || v == "tmpfs" }},
		{"PrivateTmp", yes},
		{"NoNewPrivileges", yes},
		{"CapabilityBoundingSet", func(v string) bool { return v == "" }},
		{"RestrictAddressFamilies", func(v string) bool {
			f := strings.Fields(v)
			slices.Sort(f)
			return slices.Equal(f, []string{"AF_INET", "AF_INET6", "AF_UNIX"})
		}},
		{"MemoryDenyWriteExecute", yes},
		{"StateDirectory", func(v string) bool { return v == "filtrate" }},
		{"Restart", func(v string) bool { return v == "on-failure" }},
		{"ExecReload", func(v string) bool { return strings.Contains(v, "kill -HUP $MAINPID") }},
		// Common practice: well above the 1024 soft limit most systems default to.
		{"LimitNOFILE", func(v string) bool { n, err := strconv.Atoi(v); return err == nil && n >= 4096 }},
		{"TimeoutStopSec", func(v string) bool {
			d, err := time.ParseDuration(v)
			return err == nil && d >= drainSeconds*time.Second
		}},
		{"ProtectKernelTunables", yes},
		{"ProtectKernelModules", yes},
		{"ProtectControlGroups", yes},
		{"RestrictNamespaces", yes},
		{"LockPersonality", yes},
		{"SystemCallArchitectures", func(v string) bool { return v == "native" }},
	}
	for _, h := range hardening {
		v := one(h.key)
		require.True(t, h.ok(v), "%s=%s", h.key, v)
	}
	for _, l := range lines {
		if l.section == "Service" && !strings.HasPrefix(l.key, "Exec") && !strings.HasPrefix(l.key, "Type") {
			require.True(t, l.commented, "%s=%s has no comment", l.key, l.value)
		}
	}
	require.Contains(t, unitValues(lines, "Service", "SystemCallFilter"), "@system-service")
	dyn := unitValues(lines, "Service", "DynamicUser")
	user := unitValues(lines, "Service", "User")
	require.True(t, (len(dyn) == 1 && yes(dyn[0])) || (len(user) == 1 && user[0] != "root" && user[0] != "0"),
		"DynamicUser=yes or a dedicated User=")
	require.True(t, strings.HasSuffix(one("ExecStart"), " serve --config "+configPath), "ExecStart=%s", one("ExecStart"))
	require.Contains(t, unitValues(lines, "Install", "WantedBy"), "multi-user.target")
}

// TestSystemdAnalyzeVerify runs systemd-analyze verify on the unit when it
// is installed, with the binary path pointed at an executable that exists.
func TestSystemdAnalyzeVerify(t *testing.T) {
	analyze, err := exec.LookPath("systemd-analyze")
	if err != nil {
		t.Skip("systemd-analyze is not installed")
	}
	self, err := os.Executable()
	require.NoError(t, err)
	unit := strings.ReplaceAll(string(readFile(t, unitFile)), "/usr/local/bin/filtrate", self)
	p := filepath.Join(t.TempDir(), "filtrate.service")
	require.NoError(t, os.WriteFile(p, []byte(unit), 0o644))
	out, err := exec.CommandContext(t.Context(), analyze, "verify", p).CombinedOutput()
	require.NoError(t, err, "systemd-analyze verify:\n%s", out)
	for l := range strings.Lines(string(out)) {
		require.NotContains(t, l, p, "systemd-analyze verify reports a problem in the unit")
	}
}

// ---- container -----------------------------------------------------------

// instruction is one Containerfile instruction, continuation lines joined.
type instruction struct {
	cmd, args string
}

func parseContainerfile(t *testing.T) (ins []instruction, comments string) {
	t.Helper()
	var cur strings.Builder
	sc := bufio.NewScanner(bytes.NewReader(readFile(t, containerFile)))
	for sc.Scan() {
		l := strings.TrimSpace(sc.Text())
		if strings.HasPrefix(l, "#") {
			comments += l + "\n"
			continue
		}
		if l == "" && cur.Len() == 0 {
			continue
		}
		if s, ok := strings.CutSuffix(l, "\\"); ok {
			cur.WriteString(s + " ")
			continue
		}
		cur.WriteString(l)
		cmd, args, _ := strings.Cut(strings.TrimSpace(cur.String()), " ")
		ins = append(ins, instruction{strings.ToUpper(cmd), strings.TrimSpace(args)})
		cur.Reset()
	}
	require.NoError(t, sc.Err())
	require.Zero(t, cur.Len(), "dangling continuation line")
	return ins, comments
}

func TestContainerfile(t *testing.T) {
	ins, comments := parseContainerfile(t)
	// ARG defaults declared before the first FROM may be used in FROM.
	globalArgs := map[string]string{}
	var stages [][]instruction
	for _, in := range ins {
		switch {
		case in.cmd == "FROM":
			stages = append(stages, nil)
		case len(stages) == 0 && in.cmd == "ARG":
			k, v, _ := strings.Cut(in.args, "=")
			globalArgs[k] = v
			continue
		}
		require.NotEmpty(t, stages, "instruction %s before FROM", in.cmd)
		stages[len(stages)-1] = append(stages[len(stages)-1], in)
	}
	require.Len(t, stages, 2, "a build stage and a runtime stage")
	image := func(stage []instruction) string {
		f := strings.Fields(stage[0].args)
		img := f[0]
		if strings.HasPrefix(img, "--platform") {
			img = f[1]
		}
		for k, v := range globalArgs {
			img = strings.ReplaceAll(img, "${"+k+"}", v)
		}
		return img
	}
	require.Equal(t, "golang:1.26", image(stages[0]))
	require.Equal(t, "gcr.io/distroless/static-debian12:nonroot", image(stages[1]))

	var build string
	for _, in := range stages[0] {
		if in.cmd == "RUN" && strings.Contains(in.args, "go build") {
			build = in.args
		}
	}
	for _, want := range []string{"CGO_ENABLED=0", "-trimpath", `-ldflags "-s -w -X main.version=$VERSION"`, "./cmd/filtrate"} {
		require.Contains(t, build, want)
	}

	last := func(cmd string) string {
		var v string
		for _, in := range stages[1] {
			if in.cmd == cmd {
				v = in.args
			}
		}
		return v
	}
	require.True(t, strings.HasPrefix(last("USER"), "nonroot"), "USER %s", last("USER"))
	require.ElementsMatch(t, []string{strconv.Itoa(mllpPort), strconv.Itoa(httpPort)}, strings.Fields(last("EXPOSE")))
	var entry, cmd []string
	require.NoError(t, json.Unmarshal([]byte(last("ENTRYPOINT")), &entry), "ENTRYPOINT in exec form")
	require.NoError(t, json.Unmarshal([]byte(last("CMD")), &cmd), "CMD in exec form")
	require.Equal(t, []string{"/filtrate"}, entry)
	require.Equal(t, []string{"serve", "--config", configPath}, cmd)
	require.Contains(t, comments, ".dockerignore", "guidance for the build context")
}

// TestVersionVariableExists checks that -X main.version has a target: a
// package-level string variable "version" in cmd/filtrate.
func TestVersionVariableExists(t *testing.T) {
	fset := token.NewFileSet()
	dir := filepath.Join("..", "cmd", "filtrate")
	entries, err := os.ReadDir(dir)
	require.NoError(t, err)
	found := false
	for _, e := range entries {
		if !strings.HasSuffix(e.Name(), ".go") || strings.HasSuffix(e.Name(), "_test.go") {
			continue
		}
		f, err := parser.ParseFile(fset, filepath.Join(dir, e.Name()), nil, parser.SkipObjectResolution)
		require.NoError(t, err)
		require.Equal(t, "main", f.Name.Name)
		for _, decl := range f.Decls {
			gd, ok := decl.(*ast.GenDecl)
			if !ok || gd.Tok != token.VAR {
				continue
			}
			for _, spec := range gd.Specs {
				for _, n := range spec.(*ast.ValueSpec).Names {
					found = found || n.Name == "version"
				}
			}
		}
	}
	require.True(t, found, "cmd/filtrate declares var version (set by -ldflags -X main.version)")
}

// TestKustomizeBuild renders the manifests with kubectl's built-in
// kustomize when kubectl is installed.
func TestKustomizeBuild(t *testing.T) {
	kubectl, err := exec.LookPath("kubectl")
	if err != nil {
		t.Skip("kubectl is not installed")
	}
	for _, dir := range []string{kubeDir, migrateDir} {
		var stderr bytes.Buffer
		c := exec.CommandContext(t.Context(), kubectl, "kustomize", dir)
		c.Stderr = &stderr
		out, err := c.Output()
		require.NoError(t, err, "kubectl kustomize %s: %s", dir, stderr.String())
		require.Contains(t, string(out), "image: registry.example.org/lab/filtrate:", "%s: the image is set", dir)
		require.NotContains(t, string(out), "CHANGE-ME", "%s: no example Secret is rendered", dir)
	}
}

func TestREADME(t *testing.T) {
	readme := string(readFile(t, readmeFile))
	for _, want := range []string{
		"filtrate.reference.yml",
		"filtrate store migrate",
		"pg_dump",
		"filtrate audit verify",
		"FOR UPDATE SKIP LOCKED",
		"not built here",
		"eGFR is an estimate",
	} {
		require.Contains(t, strings.ToLower(readme), strings.ToLower(want), fmt.Sprintf("%s mentions %q", readmeFile, want))
	}
}
