package main

import (
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"

	"gopkg.in/yaml.v3"
)

// repoFile reads a file at the top of the repository.
func repoFile(t *testing.T, name string) []byte {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("..", "..", name))
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// composeFile is the part of the Compose file format the checks read.
type composeFile struct {
	Services map[string]struct {
		Image       string            `yaml:"image"`
		Build       any               `yaml:"build"`
		Command     []string          `yaml:"command"`
		Environment map[string]string `yaml:"environment"`
		Volumes     []string          `yaml:"volumes"`
		Profiles    []string          `yaml:"profiles"`
		Healthcheck *struct {
			Test []string `yaml:"test"`
		} `yaml:"healthcheck"`
		DependsOn map[string]struct {
			Condition string `yaml:"condition"`
		} `yaml:"depends_on"`
	} `yaml:"services"`
}

func TestComposeFile(t *testing.T) {
	var cf composeFile
	dec := yaml.NewDecoder(strings.NewReader(string(repoFile(t, "docker-compose.yml"))))
	dec.KnownFields(false)
	if err := dec.Decode(&cf); err != nil {
		t.Fatalf("docker-compose.yml is not the YAML the checks expect: %v", err)
	}
	pg, ok := cf.Services["postgres"]
	if !ok {
		t.Fatal("no service postgres")
	}
	if pg.Image != "postgres:15" {
		t.Errorf("postgres image %q, want postgres:15", pg.Image)
	}
	if pg.Healthcheck == nil || !strings.Contains(strings.Join(pg.Healthcheck.Test, " "), "pg_isready") {
		t.Errorf("postgres healthcheck %v does not run pg_isready", pg.Healthcheck)
	}
	for _, name := range []string{"sidecar", "demo"} {
		s, ok := cf.Services[name]
		if !ok {
			t.Errorf("no service %s", name)
			continue
		}
		if s.DependsOn["postgres"].Condition != "service_healthy" {
			t.Errorf("%s: depends_on postgres condition %q, want service_healthy", name, s.DependsOn["postgres"].Condition)
		}
		if s.Build == nil {
			t.Errorf("%s: no build section: the image is built from the Dockerfile", name)
		}
	}
	sc := cf.Services["sidecar"]
	if len(sc.Command) == 0 || sc.Command[0] != "run" {
		t.Errorf("sidecar command %v, want run", sc.Command)
	}
	if !strings.HasPrefix(sc.Environment["DATABASE_URL"], "postgres://") || !strings.Contains(sc.Environment["DATABASE_URL"], "@postgres:5432/") {
		t.Errorf("sidecar DATABASE_URL %q does not point at the postgres service", sc.Environment["DATABASE_URL"])
	}
	// The sidecar is no superuser: it connects as a role of its own that
	// the init script creates without SUPERUSER (README, Security).
	super := pg.Environment["POSTGRES_USER"]
	for _, name := range []string{"sidecar", "demo"} {
		s := cf.Services[name]
		dbURL := s.Environment["DATABASE_URL"] + s.Environment["SIDETREND_DEMO_DB"]
		if u, err := url.Parse(dbURL); err != nil || u.User.Username() == "" || u.User.Username() == super {
			t.Errorf("%s connects as %q (err %v), want a role of its own, not the superuser %q", name, dbURL, err, super)
		}
	}
	if !slices.Contains(pg.Volumes, "./docker/initdb.sql:/docker-entrypoint-initdb.d/10-sidetrend.sql:ro") {
		t.Errorf("postgres volumes %v do not mount docker/initdb.sql", pg.Volumes)
	}
	if init := string(repoFile(t, "docker/initdb.sql")); !regexp.MustCompile(`CREATE ROLE sidetrend LOGIN [^;]*NOSUPERUSER`).MatchString(init) {
		t.Errorf("docker/initdb.sql does not create role sidetrend without SUPERUSER:\n%s", init)
	}
	if sc.Environment["SIDETREND_MIGRATE"] != "true" {
		t.Errorf("sidecar SIDETREND_MIGRATE %q, want true (migrations on start)", sc.Environment["SIDETREND_MIGRATE"])
	}
	demo := cf.Services["demo"]
	if len(demo.Profiles) != 1 || demo.Profiles[0] != "demo" {
		t.Errorf("demo profiles %v, want [demo]", demo.Profiles)
	}
	if len(demo.Command) == 0 || demo.Command[0] != "demo" || !strings.HasPrefix(demo.Environment["SIDETREND_DEMO_DB"], "postgres://") {
		t.Errorf("demo service runs %v with SIDETREND_DEMO_DB %q, want the demo against the postgres service", demo.Command, demo.Environment["SIDETREND_DEMO_DB"])
	}
	// Every SIDETREND_* variable the services set is one a flag reads.
	known := map[string]bool{}
	for _, c := range testApp(nil).Commands {
		for _, f := range c.Flags {
			if ev, ok := f.(interface{ GetEnvVars() []string }); ok {
				for _, e := range ev.GetEnvVars() {
					known[e] = true
				}
			}
		}
	}
	for name, s := range cf.Services {
		for k := range s.Environment {
			if strings.HasPrefix(k, "SIDETREND_") && !known[k] {
				t.Errorf("service %s sets %s, which no flag reads", name, k)
			}
		}
	}
}

func TestDockerfile(t *testing.T) {
	df := string(repoFile(t, "Dockerfile"))
	from := regexp.MustCompile(`(?m)^FROM\s+(\S+)`).FindAllStringSubmatch(df, -1)
	if len(from) != 2 || from[0][1] != "golang:1.26" || from[1][1] != "debian:bookworm-slim" {
		t.Errorf("Dockerfile stages %v, want golang:1.26 then debian:bookworm-slim", from)
	}
	if !strings.Contains(df, "scripts/docker-build-steps.sh") {
		t.Error("the Dockerfile does not run scripts/docker-build-steps.sh: its build steps and the script would drift apart")
	}
	if !regexp.MustCompile(`(?m)^USER\s+sidetrend`).MatchString(df) {
		t.Error("the runtime stage does not drop root (USER sidetrend)")
	}
}

// TestDockerBuildSteps runs the Dockerfile's build steps without Docker and
// checks that the binary they make runs.
func TestDockerBuildSteps(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the static binary; skipped with -short")
	}
	out := t.TempDir()
	cmd := exec.Command("bash", filepath.Join("..", "..", "scripts", "docker-build-steps.sh"), out)
	cmd.Env = append(os.Environ(), "VERSION=test-build")
	b, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("docker-build-steps.sh: %v\n%s", err, b)
	}
	if !strings.Contains(string(b), "sidetrend test-build") {
		t.Errorf("the built binary did not print its stamped version:\n%s", b)
	}
}
