package main

import (
	"bufio"
	"bytes"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"gopkg.in/yaml.v3"
)

// The scale-out examples in docs/ are run as written: the Slurm array
// script once per array task and the Kubernetes Indexed Job's container
// command once per completion index, with the variables the schedulers
// set, on a small synthetic batch with one broken capture; then their merge
// steps. The merged summary must equal a one-machine batch.

const docsDir = "../../docs"

// buildBinary builds trackfactor into a temporary folder.
func buildBinary(t *testing.T) string {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "trackfactor")
	cmd := exec.Command("go", "build", "-o", bin, ".")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// runScript runs a shell script with env added to the test's environment
// (PATH starting with the folder of the built program) and returns its exit
// code.
func runScript(t *testing.T, shell, script string, env map[string]string, bin string) (int, string) {
	t.Helper()
	cmd := exec.Command(shell, "-c", script)
	cmd.Env = append(os.Environ(), "PATH="+filepath.Dir(bin)+string(os.PathListSeparator)+os.Getenv("PATH"))
	for k, v := range env {
		cmd.Env = append(cmd.Env, k+"="+v)
	}
	var out bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &out
	err := cmd.Run()
	var ee *exec.ExitError
	switch {
	case err == nil:
		return 0, out.String()
	case errors.As(err, &ee):
		return ee.ExitCode(), out.String()
	}
	t.Fatalf("running %s: %v", shell, err)
	return -1, ""
}

// wholeRun is the one-machine batch the shards must add up to.
func wholeRun(t *testing.T, root string) []summaryRow {
	t.Helper()
	out := filepath.Join(t.TempDir(), "whole")
	runCLI(t, "batch", "-q", "-o", out, root)
	return comparable(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
}

func TestSlurmExample(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the program; in the full suite only")
	}
	path := filepath.Join(docsDir, "slurm", "batch-array.sbatch")
	script, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	merge, err := os.ReadFile(filepath.Join(docsDir, "slurm", "merge.sbatch"))
	if err != nil {
		t.Fatal(err)
	}
	// The directives: options sbatch knows (sbatch(1)), in --name=value form.
	known := map[string]bool{"job-name": true, "array": true, "cpus-per-task": true, "mem": true, "time": true, "output": true}
	shards := 0
	for _, text := range []string{string(script), string(merge)} {
		sc := bufio.NewScanner(strings.NewReader(text))
		for sc.Scan() {
			line := sc.Text()
			if !strings.HasPrefix(line, "#SBATCH") {
				continue
			}
			m := regexp.MustCompile(`^#SBATCH --([a-z-]+)=(\S+)$`).FindStringSubmatch(line)
			if m == nil || !known[m[1]] {
				t.Errorf("directive %q: want #SBATCH --OPTION=VALUE with an sbatch option", line)
				continue
			}
			if m[1] == "array" {
				a := regexp.MustCompile(`^1-(\d+)$`).FindStringSubmatch(m[2])
				if a == nil {
					t.Fatalf("--array=%s: want 1-N, so that task ids are the shard numbers", m[2])
				}
				shards, _ = strconv.Atoi(a[1])
			}
		}
	}
	if shards < 2 {
		t.Fatalf("no --array=1-N directive in %s", path)
	}
	for _, f := range []string{path, filepath.Join(docsDir, "slurm", "merge.sbatch")} {
		if out, err := exec.Command("bash", "-n", f).CombinedOutput(); err != nil {
			t.Fatalf("bash -n %s: %v\n%s", f, err, out)
		}
	}
	bin := buildBinary(t)
	root := batchRoot(t)
	out := filepath.Join(t.TempDir(), "shared-out")
	for k := 1; k <= shards; k++ {
		env := map[string]string{"SLURM_ARRAY_TASK_ID": strconv.Itoa(k), "SLURM_ARRAY_TASK_COUNT": strconv.Itoa(shards),
			"SLURM_CPUS_PER_TASK": "2", "CAPTURES": root, "OUT": out}
		if code, log := runScript(t, "bash", string(script), env, bin); code != 0 {
			t.Fatalf("array task %d/%d: exit %d\n%s", k, shards, code, log)
		}
	}
	code, log := runScript(t, "bash", string(merge), map[string]string{"OUT": out}, bin)
	if code != exitInput {
		t.Errorf("merge: exit %d, want %d (one capture is broken)\n%s", code, exitInput, log)
	}
	if got, want := comparable(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows), wholeRun(t, root); !reflect.DeepEqual(got, want) {
		t.Errorf("Slurm shards merged differ from the one-machine run:\n got %+v\nwant %+v", got, want)
	}
}

// k8sJob is the part of a Kubernetes Job the test reads.
type k8sJob struct {
	APIVersion string `yaml:"apiVersion"`
	Kind       string `yaml:"kind"`
	Metadata   struct {
		Name string `yaml:"name"`
	} `yaml:"metadata"`
	Spec struct {
		CompletionMode string `yaml:"completionMode"`
		Completions    int    `yaml:"completions"`
		Parallelism    int    `yaml:"parallelism"`
		Template       struct {
			Spec struct {
				RestartPolicy string `yaml:"restartPolicy"`
				Containers    []struct {
					Image   string   `yaml:"image"`
					Command []string `yaml:"command"`
					Args    []string `yaml:"args"`
					Env     []struct {
						Name  string `yaml:"name"`
						Value string `yaml:"value"`
					} `yaml:"env"`
				} `yaml:"containers"`
			} `yaml:"spec"`
		} `yaml:"template"`
	} `yaml:"spec"`
}

func TestKubernetesExample(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the program; in the full suite only")
	}
	data, err := os.ReadFile(filepath.Join(docsDir, "kubernetes", "batch-indexed-job.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var jobs []k8sJob
	for {
		var j map[string]any
		if err := dec.Decode(&j); err != nil {
			break
		}
		b, _ := yaml.Marshal(j)
		var job k8sJob
		if err := yaml.Unmarshal(b, &job); err != nil {
			t.Fatal(err)
		}
		jobs = append(jobs, job)
	}
	if len(jobs) != 2 {
		t.Fatalf("%d documents, want the batch Job and the merge Job", len(jobs))
	}
	batch, merge := jobs[0], jobs[1]
	for _, j := range jobs {
		c := j.Spec.Template.Spec.Containers
		if j.APIVersion != "batch/v1" || j.Kind != "Job" || j.Spec.Template.Spec.RestartPolicy != "Never" || len(c) != 1 ||
			c[0].Image == "" || !reflect.DeepEqual(c[0].Command, []string{"sh", "-c"}) || len(c[0].Args) != 1 {
			t.Fatalf("Job %q: want batch/v1 Job, restartPolicy Never, one container running sh -c SCRIPT", j.Metadata.Name)
		}
	}
	// Indexed Job: the controller sets JOB_COMPLETION_INDEX to 0..completions-1
	// (Kubernetes documentation, "Jobs", completion mode).
	if batch.Spec.CompletionMode != "Indexed" || batch.Spec.Completions < 2 {
		t.Fatalf("batch Job: completionMode %q, completions %d; want Indexed with 2 or more", batch.Spec.CompletionMode, batch.Spec.Completions)
	}
	env := func(j k8sJob) map[string]string {
		m := map[string]string{}
		for _, e := range j.Spec.Template.Spec.Containers[0].Env {
			m[e.Name] = e.Value
		}
		return m
	}
	benv, menv := env(batch), env(merge)
	if benv["SHARDS"] != strconv.Itoa(batch.Spec.Completions) {
		t.Errorf("SHARDS=%s but completions %d: keep them equal", benv["SHARDS"], batch.Spec.Completions)
	}
	if benv["OUT"] == "" || benv["CAPTURES"] == "" || menv["OUT"] != benv["OUT"] {
		t.Fatalf("want CAPTURES and OUT in the batch Job and the same OUT in the merge Job: %v, %v", benv, menv)
	}
	bin := buildBinary(t)
	root := batchRoot(t)
	out := filepath.Join(t.TempDir(), "volume-out")
	// The volume's paths become the test's folders; everything else is
	// as written.
	benv["CAPTURES"], benv["OUT"], menv["OUT"] = root, out, out
	for i := 0; i < batch.Spec.Completions; i++ {
		benv["JOB_COMPLETION_INDEX"] = strconv.Itoa(i)
		if code, log := runScript(t, "sh", batch.Spec.Template.Spec.Containers[0].Args[0], benv, bin); code != 0 {
			t.Fatalf("pod %d: exit %d\n%s", i, code, log)
		}
	}
	code, log := runScript(t, "sh", merge.Spec.Template.Spec.Containers[0].Args[0], menv, bin)
	if code != exitInput {
		t.Errorf("merge pod: exit %d, want %d (one capture is broken)\n%s", code, exitInput, log)
	}
	if got, want := comparable(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows), wholeRun(t, root); !reflect.DeepEqual(got, want) {
		t.Errorf("Indexed Job shards merged differ from the one-machine run:\n got %+v\nwant %+v", got, want)
	}
}
