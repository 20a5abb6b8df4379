"""The deployment files in deploy/: systemd units, the container file, Kubernetes manifests.

What runs here: ``systemd-analyze verify`` and ``systemd-analyze security`` on the units where
systemd-analyze is installed (skipped with a message where it is not), ``kubectl kustomize``
where kubectl is installed, and the statistics, Parquet, chart and backup code under the
kernel's refusal of writable-and-executable memory (what ``MemoryDenyWriteExecute=yes`` asks
for) where the kernel offers it. The rest is read statically: no container engine or cluster
runs in CI, so the container file is parsed, not built, and the manifests are parsed, not
applied.
"""

from __future__ import annotations

import ctypes
import json
import os
import re
import shlex
import shutil
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml

from monitor.config import PlumblineConfig, load_config

REPO = Path(__file__).resolve().parent.parent
DEPLOY = REPO / "deploy"
SYSTEMD = DEPLOY / "systemd"
CONTAINER = DEPLOY / "container"
KUBERNETES = DEPLOY / "kubernetes"

INSTALLED_PROGRAM = "/opt/plumbline/bin/plumbline"  # where the units expect the program
INSTALLED_DASK = "/opt/plumbline/bin/dask"  # Dask's command, installed by the dask extra
DASK_UNITS = ("plumbline-dask-scheduler", "plumbline-dask-worker@")
DASK_PODS = ("plumbline-dask-scheduler", "plumbline-dask-workers")
CONFIG_PATH = "/etc/plumbline/plumbline.yaml"
SERVICES = ("plumbline", "plumbline-pass", "plumbline-digest", "plumbline-backup")
TIMERS = ("plumbline-pass", "plumbline-digest", "plumbline-backup")


# --------------------------------------------------------------------------- helpers


def unit_entries(path: Path) -> dict[str, list[tuple[str, str]]]:
    """A unit file as section -> [(key, value)], keeping repeated keys (systemd allows them)."""
    sections: dict[str, list[tuple[str, str]]] = {}
    current: list[tuple[str, str]] | None = None
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("[") and line.endswith("]"):
            current = sections.setdefault(line[1:-1], [])
            continue
        assert current is not None, f"{path}: {line!r} outside a section"
        key, sep, value = line.partition("=")
        assert sep, f"{path}: {line!r} is not KEY=VALUE"
        current.append((key.strip(), value.strip()))
    return sections


def unit_values(path: Path, section: str, key: str) -> list[str]:
    return [value for k, value in unit_entries(path).get(section, []) if k == key]


def unit_value(path: Path, section: str, key: str) -> str:
    values = unit_values(path, section, key)
    assert len(values) == 1, f"{path.name}: [{section}] {key} given {len(values)} times"
    return values[0]


def seconds(text: str) -> float:
    """A systemd time span such as ``5min``, ``300`` or ``1min 30s``, in seconds."""
    units = {"": 1, "s": 1, "sec": 1, "min": 60, "m": 60, "h": 3600, "hr": 3600}
    total = 0.0
    for number, unit in re.findall(r"(\d+(?:\.\d+)?)\s*([a-z]*)", text):
        total += float(number) * units[unit]
    return total


def config_write_paths(config: PlumblineConfig) -> list[Path]:
    """Every folder a pass or the daemon writes into, by the config."""
    paths = [config.database.parent, config.notify.html_dir, config.export.folder]
    for feed in config.feeds.values():
        paths += [feed.inbox, feed.archive, feed.rejected]
    return paths


def is_under(path: Path, roots: list[Path]) -> bool:
    return any(path == root or root in path.parents for root in roots)


def installed_program() -> Path:
    found = shutil.which("plumbline") or str(Path(sys.executable).with_name("plumbline"))
    program = Path(found)
    if not program.exists():
        pytest.skip("the plumbline console script is not installed beside this Python")
    return program


def manifests() -> Iterator[tuple[Path, dict[str, Any]]]:
    for path in sorted(KUBERNETES.rglob("*.yaml")):
        for document in yaml.safe_load_all(path.read_text(encoding="utf-8")):
            assert isinstance(document, dict), f"{path}: a document that is not a mapping"
            yield path, document


def of_kind(kind: str) -> list[dict[str, Any]]:
    return [document for _, document in manifests() if document["kind"] == kind]


def manifest_named(kind: str, name: str, folder: str | None = None) -> dict[str, Any]:
    """The one manifest of ``kind`` called ``name`` (in ``kubernetes/FOLDER`` when given: the
    dask shape patches the base's ConfigMap under the same name)."""
    found = [
        document for path, document in manifests()
        if document["kind"] == kind and document["metadata"]["name"] == name
        and (folder is None or path.parent == KUBERNETES / folder)
    ]
    assert len(found) == 1, f"{len(found)} {kind} manifests named {name}"
    return found[0]


def pod_specs() -> list[tuple[str, dict[str, Any]]]:
    found = [(d["metadata"]["name"], d["spec"]["template"]["spec"]) for d in of_kind("Deployment")]
    found += [
        (d["metadata"]["name"], d["spec"]["jobTemplate"]["spec"]["template"]["spec"])
        for d in of_kind("CronJob")
    ]
    return found


def quantity_bytes(text: str) -> float:
    match = re.fullmatch(r"(\d+(?:\.\d+)?)(Ki|Mi|Gi|Ti)?", str(text))
    assert match, f"unexpected quantity {text!r}"
    factor = {None: 1, "Ki": 2**10, "Mi": 2**20, "Gi": 2**30, "Ti": 2**40}[match.group(2)]
    return float(match.group(1)) * factor


def containerfile_instructions() -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) in order, continuation lines joined, comments dropped."""
    instructions: list[tuple[str, str]] = []
    pending = ""
    for raw in (CONTAINER / "Containerfile").read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        line = pending + line
        pending = ""
        word, _, rest = line.partition(" ")
        instructions.append((word.upper(), rest.strip()))
    assert not pending, "the Containerfile ends inside a continued line"
    return instructions


def image_uid() -> int:
    users = [args for word, args in containerfile_instructions() if word == "USER"]
    return int(users[-1].split(":")[0])


# --------------------------------------------------------------------------- systemd


def test_units_run_the_installed_program_on_the_etc_config() -> None:
    for name in SERVICES:
        start = unit_value(SYSTEMD / f"{name}.service", "Service", "ExecStart")
        assert INSTALLED_PROGRAM in start, name
        assert f"-c {CONFIG_PATH}" in start, name
    daemon = unit_value(SYSTEMD / "plumbline.service", "Service", "ExecStart")
    assert shlex.split(daemon)[:2] == [INSTALLED_PROGRAM, "run"]
    one_pass = unit_value(SYSTEMD / "plumbline-pass.service", "Service", "ExecStart")
    assert shlex.split(one_pass)[:2] == [INSTALLED_PROGRAM, "pass"]
    for name in TIMERS:
        assert (SYSTEMD / f"{name}.timer").exists()


def test_daemon_unit_restarts_and_stops_gracefully() -> None:
    unit = SYSTEMD / "plumbline.service"
    assert unit_value(unit, "Service", "Restart") == "on-failure"
    assert unit_value(unit, "Service", "KillSignal") == "SIGTERM"
    # Long enough for a pass stage to finish (a whole pass over 10,000 series is under a minute
    # by DESIGN.md section 11); systemd's default of 90 s would be cutting it close.
    assert seconds(unit_value(unit, "Service", "TimeoutStopSec")) >= 120
    assert unit_value(unit, "Service", "User") == "plumbline"
    assert unit_value(unit, "Service", "Group") == "plumbline"
    assert unit_value(unit, "Install", "WantedBy") == "multi-user.target"


@pytest.mark.parametrize("name", SERVICES)
def test_units_are_sandboxed(name: str) -> None:
    unit = SYSTEMD / f"{name}.service"
    expected = {
        "NoNewPrivileges": "yes",
        "ProtectSystem": "strict",
        "ProtectHome": "yes",
        "PrivateTmp": "yes",
        "PrivateDevices": "yes",
        "ProtectKernelTunables": "yes",
        "ProtectKernelModules": "yes",
        "ProtectKernelLogs": "yes",
        "ProtectControlGroups": "yes",
        "RestrictNamespaces": "yes",
        "LockPersonality": "yes",
        "MemoryDenyWriteExecute": "yes",
        "CapabilityBoundingSet": "",
        "UMask": "0027",
        "User": "plumbline",
    }
    for key, value in expected.items():
        assert unit_value(unit, "Service", key) == value, f"{name}: {key}"
    assert "@system-service" in unit_values(unit, "Service", "SystemCallFilter")
    families = set(unit_value(unit, "Service", "RestrictAddressFamilies").split())
    needs_smtp = name != "plumbline-backup"
    assert families == ({"AF_UNIX", "AF_INET", "AF_INET6"} if needs_smtp else {"AF_UNIX"})


def test_smtp_secrets_come_from_the_environment_file_the_config_names() -> None:
    config = load_config(SYSTEMD / "plumbline.yaml.example")
    assert config.notify.email is not None
    named = {config.notify.email.username_env, config.notify.email.password_env}
    assert unit_value(SYSTEMD / "plumbline.service", "Service", "EnvironmentFile").lstrip("-") == (
        "/etc/plumbline/smtp.env"
    )
    assignments = [
        line.split("=", 1)
        for line in (SYSTEMD / "smtp.env.example").read_text(encoding="utf-8").splitlines()
        if line and not line.startswith("#")
    ]
    assert {key for key, _ in assignments} == named
    assert all("REPLACE" in value for _, value in assignments)  # placeholders, not secrets
    # The YAML names the variables and holds no secret itself.
    assert "password:" not in (SYSTEMD / "plumbline.yaml.example").read_text(encoding="utf-8")


@pytest.mark.parametrize("name", ["plumbline", "plumbline-pass", "plumbline-digest"])
def test_sandbox_lets_the_example_config_write_where_it_must(name: str) -> None:
    """ProtectSystem=strict makes everything read-only but the unit's state and cache folders
    and its ReadWritePaths; every folder the example config writes must be among them."""
    unit = SYSTEMD / f"{name}.service"
    config = load_config(SYSTEMD / "plumbline.yaml.example")
    writable = [Path("/var/lib") / unit_value(unit, "Service", "StateDirectory")]
    for entry in unit_values(unit, "Service", "ReadWritePaths"):
        writable += [Path(path.lstrip("-")) for path in entry.split()]
    for path in config_write_paths(config):
        assert is_under(path, writable), f"{name}: {path} is not writable in the sandbox"
    # The lock file and the -wal/-shm files sit beside the database, in the state folder.
    assert config.database.parent == writable[0]


def test_backup_unit_writes_only_backups_and_takes_no_network() -> None:
    unit = SYSTEMD / "plumbline-backup.service"
    start = unit_value(unit, "Service", "ExecStart")
    assert " backup " in start and "/var/backups/plumbline/" in start
    assert unit_value(unit, "Service", "ReadWritePaths") == "/var/backups/plumbline"
    assert unit_value(unit, "Service", "PrivateNetwork") == "yes"


def _copy_units_for_verify(tmp_path: Path) -> list[Path]:
    """The units with the program's path pointed at the installed console script: verify
    checks that ExecStart's program exists, and /opt/plumbline is not installed here."""
    program = installed_program()
    dask = program.with_name("dask")
    copies = []
    for path in sorted(SYSTEMD.glob("plumbline*.service")) + sorted(SYSTEMD.glob("*.timer")):
        text = path.read_text(encoding="utf-8")
        if path.suffix == ".service":
            assert INSTALLED_PROGRAM in text or INSTALLED_DASK in text
        copy = tmp_path / path.name
        text = text.replace(INSTALLED_PROGRAM, str(program)).replace(INSTALLED_DASK, str(dask))
        copy.write_text(text, encoding="utf-8")
        copies.append(copy)
    return copies


def _systemd_analyze() -> str:
    found = shutil.which("systemd-analyze")
    if found is None:
        pytest.skip("systemd-analyze is not installed here (apt-get install systemd to run this)")
    return found


def test_systemd_analyze_verify_accepts_the_units(tmp_path: Path) -> None:
    analyze = _systemd_analyze()
    copies = _copy_units_for_verify(tmp_path)
    result = subprocess.run(
        [analyze, "verify", *map(str, copies)],
        capture_output=True,
        text=True,
        timeout=60,
        env={**os.environ, "SYSTEMD_LOG_COLOR": "0"},
    )
    # verify reports unknown keys and bad values as warnings, not through its exit status:
    # no line may name one of our units.
    ours = [
        line
        for line in (result.stdout + result.stderr).splitlines()
        if any(copy.name in line for copy in copies) or str(tmp_path) in line
    ]
    assert result.returncode == 0, result.stdout + result.stderr
    assert ours == []


@pytest.mark.parametrize("name", SERVICES)
def test_systemd_analyze_security_rates_the_units_well_protected(tmp_path: Path, name: str) -> None:
    analyze = _systemd_analyze()
    usage = subprocess.run([analyze, "security", "--help"], capture_output=True, text=True)
    if "--offline" not in usage.stdout or "--threshold" not in usage.stdout:
        pytest.skip("this systemd-analyze cannot rate a unit file offline (systemd < 250)")
    copy = next(c for c in _copy_units_for_verify(tmp_path) if c.name == f"{name}.service")
    # The overall exposure is 0.0 (sandboxed) to 10.0; --threshold takes it times ten.
    result = subprocess.run(
        [analyze, "security", "--offline=yes", "--threshold=20", "--no-pager", str(copy)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 0, result.stdout[-2000:] + result.stderr


def test_runtime_needs_no_writable_executable_memory(tmp_path: Path) -> None:
    """MemoryDenyWriteExecute=yes kills nothing if numpy, scipy, pandas, pyarrow, matplotlib and
    the store never ask for memory that is both writable and executable. The kernel's own switch
    for that rule (prctl PR_SET_MDWE, Linux 6.3 and later) is set in a child process, which then
    proves the rule holds by failing to map W+X memory, and runs the real code."""
    libc = ctypes.CDLL(None, use_errno=True)
    pr_get_mdwe = 66
    if libc.prctl(pr_get_mdwe, 0, 0, 0, 0) < 0:
        pytest.skip("this kernel has no PR_SET_MDWE (Linux 6.3 or later has it)")
    csv = tmp_path / "hours.csv"
    csv.write_text(
        "orders,hours\n" + "".join(f"{x},{3 + 2 * x + (x % 3) * 0.5}\n" for x in range(1, 30)),
        encoding="utf-8",
    )
    child = textwrap.dedent(
        f"""
        import ctypes, json, mmap, sys
        libc = ctypes.CDLL(None, use_errno=True)
        assert libc.prctl(65, 1, 0, 0, 0) == 0, ctypes.get_errno()  # PR_SET_MDWE, REFUSE_EXEC_GAIN
        try:
            mmap.mmap(-1, 4096, prot=mmap.PROT_READ | mmap.PROT_WRITE | mmap.PROT_EXEC)
        except OSError:
            pass
        else:
            sys.exit("W+X memory was granted: the rule is not in force")
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        import pandas as pd, pyarrow as pa, pyarrow.parquet as pq, jinja2
        from monitor.cli import main
        from monitor.store import Store
        import monitor.daemon  # APScheduler
        assert main(["fit", {str(csv)!r}, "--response", "hours", "--predictors", "orders",
                     "--at", "orders=40", "--format", "json"]) == 0
        frame = pd.read_csv({str(csv)!r})
        pq.write_table(pa.Table.from_pandas(frame), {str(tmp_path / "t.parquet")!r})
        assert pq.read_table({str(tmp_path / "t.parquet")!r}).num_rows == len(frame)
        figure, axes = plt.subplots()
        axes.plot(frame["orders"], frame["hours"])
        figure.savefig({str(tmp_path / "t.png")!r})
        jinja2.Environment(autoescape=True).from_string("{{{{ x }}}}").render(x="<b>")
        with Store.open({str(tmp_path / "db.sqlite")!r}) as store:
            store.backup({str(tmp_path / "copy.sqlite")!r})
        """
    )
    result = subprocess.run(
        [sys.executable, "-c", child],
        capture_output=True,
        text=True,
        timeout=120,
        env={**os.environ, "MPLCONFIGDIR": str(tmp_path / "mpl")},
    )
    assert result.returncode == 0, result.stderr[-3000:]
    fit = json.loads(result.stdout)
    assert fit["n"] == 29
    assert (tmp_path / "t.png").stat().st_size > 0
    assert (tmp_path / "copy.sqlite").exists()


# --------------------------------------------------------------------------- container


def test_container_runs_as_a_fixed_non_root_user() -> None:
    instructions = containerfile_instructions()
    users = [(i, args) for i, (word, args) in enumerate(instructions) if word == "USER"]
    assert users, "the Containerfile names no USER: the image would run as root"
    first_index, _ = users[0]
    for _, args in users:
        user = args.split(":")[0]
        assert user not in ("root", "0"), "USER root after the non-root user"
    uid = image_uid()
    assert uid >= 1000
    # The user exists in the image with that uid, and nothing runs after USER as root again.
    assert any(word == "RUN" and f"--uid {uid}" in args for word, args in instructions)
    final_stage = max(i for i, (word, _) in enumerate(instructions) if word == "FROM")
    assert first_index > final_stage, "USER must be set in the final stage"


def test_container_file_shape() -> None:
    instructions = containerfile_instructions()
    bases = [args for word, args in instructions if word == "FROM"]
    assert all(base.split()[0] == "python:3.11-slim" for base in bases)
    volumes = [json.loads(args) for word, args in instructions if word == "VOLUME"]
    assert ["/var/lib/plumbline"] in volumes
    entry = [json.loads(args) for word, args in instructions if word == "ENTRYPOINT"]
    assert entry == [["plumbline"]]
    command = [json.loads(args) for word, args in instructions if word == "CMD"]
    assert command[-1][:3] == ["run", "-c", CONFIG_PATH]
    # Docker treats a health check's exit 2 as reserved; plumbline's errors exit 2.
    health = [args for word, args in instructions if word == "HEALTHCHECK"]
    assert len(health) == 1 and "plumbline status" in health[0] and health[0].endswith("exit 1")
    # What the build copies exists in the checkout, and the ignore file keeps it.
    ignore = (CONTAINER / "Containerfile.dockerignore").read_text(encoding="utf-8").splitlines()
    for word, args in instructions:
        if word == "COPY" and not args.startswith("--from"):
            for source in args.split()[:-1]:
                assert (REPO / source).exists(), source
                assert f"!{source}" in ignore or f"!{source}/" in ignore, source


def test_container_config_writes_only_to_the_volume() -> None:
    config = load_config(CONTAINER / "plumbline.yaml.example")
    volumes: list[Path] = []
    for word, args in containerfile_instructions():
        if word == "VOLUME":
            volumes += [Path(path) for path in json.loads(args)]
    for path in config_write_paths(config):
        assert is_under(path, volumes), f"{path} is outside the image's volumes"


# --------------------------------------------------------------------------- Kubernetes


def test_manifests_parse_with_the_expected_kinds() -> None:
    kinds = [document["kind"] for _, document in manifests()]
    for kind in ("CronJob", "Deployment", "PersistentVolumeClaim", "ConfigMap", "Secret"):
        assert kind in kinds, kind
    for path, document in manifests():
        assert "apiVersion" in document, path
        if document["kind"] == "Kustomization":
            for resource in document["resources"]:
                assert (path.parent / resource).exists(), f"{path}: {resource}"


def test_daemon_deployment_is_one_replica_recreated() -> None:
    deployment = manifest_named("Deployment", "plumbline")
    assert deployment["spec"]["replicas"] == 1
    assert deployment["spec"]["strategy"] == {"type": "Recreate"}
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    assert container["args"][:3] == ["run", "-c", CONFIG_PATH]


def test_cronjobs_never_overlap() -> None:
    cronjobs = {d["metadata"]["name"]: d for d in of_kind("CronJob")}
    assert {"plumbline-pass", "plumbline-digest"} <= set(cronjobs)
    for name, cronjob in cronjobs.items():
        assert cronjob["spec"]["concurrencyPolicy"] == "Forbid", name
    pass_spec = cronjobs["plumbline-pass"]["spec"]["jobTemplate"]["spec"]["template"]["spec"]
    assert pass_spec["containers"][0]["args"][:3] == ["pass", "-c", CONFIG_PATH]
    assert pass_spec["restartPolicy"] == "Never"


@pytest.mark.parametrize("name", ["plumbline", "plumbline-pass", "plumbline-digest"])
def test_pods_run_as_the_image_user_without_privileges(name: str) -> None:
    spec = dict(pod_specs())[name]
    assert spec["securityContext"]["runAsNonRoot"] is True
    assert spec["securityContext"]["runAsUser"] == image_uid()
    assert spec["securityContext"]["fsGroup"] == image_uid()
    assert spec["terminationGracePeriodSeconds"] >= 120
    for container in spec["containers"]:
        security = container["securityContext"]
        assert security["allowPrivilegeEscalation"] is False
        assert security["readOnlyRootFilesystem"] is True
        assert security["capabilities"]["drop"] == ["ALL"]
        # DESIGN.md section 11: a pass over 10,000 series peaks under 2 GiB.
        assert quantity_bytes(container["resources"]["limits"]["memory"]) >= 2 * 2**30
        assert quantity_bytes(container["resources"]["requests"]["memory"]) >= 2 * 2**30
        mounts = {m["mountPath"]: m for m in container["volumeMounts"]}
        # The root file system is read-only: matplotlib's cache (MPLCONFIGDIR) needs /tmp.
        assert "/tmp" in mounts
        assert mounts["/etc/plumbline"].get("readOnly") is True
    volumes = {v["name"]: v for v in spec["volumes"]}
    data = next(m for m in spec["containers"][0]["volumeMounts"] if m["name"] == "data")
    assert data["mountPath"] == "/var/lib/plumbline"
    assert volumes["data"]["persistentVolumeClaim"]["claimName"] == "plumbline-data"


def test_every_pod_of_the_image_has_a_writable_tmp_for_matplotlib() -> None:
    env = [args for word, args in containerfile_instructions() if word == "ENV"]
    assert any("MPLCONFIGDIR=/tmp/" in args for args in env)
    for name, spec in pod_specs():
        mounts = [m["mountPath"] for c in spec["containers"] for m in c["volumeMounts"]]
        assert "/tmp" in mounts, name


def test_volume_claim_is_read_write_once() -> None:
    claims = {d["metadata"]["name"]: d for d in of_kind("PersistentVolumeClaim")}
    assert claims["plumbline-data"]["spec"]["accessModes"] == ["ReadWriteOnce"]
    text = (KUBERNETES / "base" / "persistentvolumeclaim.yaml").read_text(encoding="utf-8")
    assert "NFS" in text  # the warning against network file systems


def test_configmap_holds_the_container_config_and_names_the_secret(tmp_path: Path) -> None:
    configmap = manifest_named("ConfigMap", "plumbline-config", "base")
    text = configmap["data"]["plumbline.yaml"]
    assert text == (CONTAINER / "plumbline.yaml.example").read_text(encoding="utf-8")
    written = tmp_path / "plumbline.yaml"
    written.write_text(text, encoding="utf-8")
    config = load_config(written)
    for path in config_write_paths(config):
        assert is_under(path, [Path("/var/lib/plumbline")]), path
    assert config.notify.email is not None
    named = {config.notify.email.username_env, config.notify.email.password_env}
    (secret,) = of_kind("Secret")
    assert set(secret["stringData"]) == named
    assert all("REPLACE" in value for value in secret["stringData"].values())
    for name, spec in pod_specs():
        if name == "plumbline-backup" or name in DASK_PODS:
            continue  # sends no mail
        env = spec["containers"][0]["env"]
        from_secret = {e["name"]: e["valueFrom"]["secretKeyRef"] for e in env}
        assert set(from_secret) == named, name
        assert all(ref["name"] == secret["metadata"]["name"] for ref in from_secret.values())


def test_kustomize_renders_each_shape() -> None:
    kubectl = shutil.which("kubectl")
    if kubectl is None:
        pytest.skip("kubectl is not installed here; the manifests were checked as YAML only")
    for shape, expected in (
        ("daemon", {"Deployment"}),
        ("dask", {"Deployment", "Service", "NetworkPolicy", "ConfigMap"}),
        ("cronjob", {"CronJob"}),
        ("backup", {"CronJob"}),
    ):
        result = subprocess.run(
            [kubectl, "kustomize", str(KUBERNETES / shape)],
            capture_output=True,
            text=True,
            timeout=60,
        )
        assert result.returncode == 0, result.stderr
        kinds = {document["kind"] for document in yaml.safe_load_all(result.stdout)}
        assert expected <= kinds, shape
        # One writer per database: a shape never carries the other's workload.
        assert not ({"Deployment", "CronJob"} <= kinds), shape


# --------------------------------------------------------------------------- the Dask cluster


def test_dask_units_run_the_installed_dask_on_loopback() -> None:
    scheduler = shlex.split(
        unit_value(SYSTEMD / "plumbline-dask-scheduler.service", "Service", "ExecStart"))
    assert scheduler[:2] == [INSTALLED_DASK, "scheduler"]
    assert scheduler[scheduler.index("--host") + 1] == "127.0.0.1"  # the example binds loopback
    assert "--no-dashboard" in scheduler
    worker = shlex.split(
        unit_value(SYSTEMD / "plumbline-dask-worker@.service", "Service", "ExecStart"))
    assert worker[:3] == [INSTALLED_DASK, "worker", "tcp://127.0.0.1:8786"]
    assert worker[worker.index("--host") + 1] == "127.0.0.1"
    assert worker[worker.index("--nthreads") + 1] == "1"
    for name in DASK_UNITS:
        unit = SYSTEMD / f"{name}.service"
        assert unit_value(unit, "Service", "User") == "plumbline"
        for key in ("NoNewPrivileges", "ProtectHome", "PrivateTmp", "PrivateDevices"):
            assert unit_value(unit, "Service", key) == "yes", f"{name}: {key}"
        assert unit_value(unit, "Service", "ProtectSystem") == "strict"
        assert unit_value(unit, "Service", "CapabilityBoundingSet") == ""
        assert "StateDirectory" not in dict(unit_entries(unit)["Service"])  # no database here


def test_dask_shape_points_the_daemon_at_its_scheduler(tmp_path: Path) -> None:
    kustomization = yaml.safe_load((KUBERNETES / "dask" / "kustomization.yaml").read_text())
    assert "../daemon" in kustomization["resources"]  # the one daemon, not a second writer
    patched = manifest_named("ConfigMap", "plumbline-config", "dask")["data"]["plumbline.yaml"]
    example = (CONTAINER / "plumbline.yaml.example").read_text(encoding="utf-8")
    assert patched.startswith(example)  # the same config, plus the compute section
    written = tmp_path / "plumbline.yaml"
    written.write_text(patched, encoding="utf-8")
    compute = load_config(written).compute
    service = manifest_named("Service", "plumbline-dask-scheduler")
    (port,) = service["spec"]["ports"]
    assert compute.engine == "dask"
    assert compute.scheduler == f"tcp://{service['metadata']['name']}:{port['port']}"
    scheduler = manifest_named("Deployment", "plumbline-dask-scheduler")
    assert service["spec"]["selector"] == scheduler["spec"]["selector"]["matchLabels"]
    assert scheduler["spec"]["replicas"] == 1
    (container,) = scheduler["spec"]["template"]["spec"]["containers"]
    assert container["command"] == ["dask", "scheduler"]
    assert container["args"][container["args"].index("--port") + 1] == str(port["targetPort"])


def test_dask_workers_take_one_thread_each_from_the_daemons_image() -> None:
    daemon = manifest_named("Deployment", "plumbline")["spec"]["template"]["spec"]["containers"][0]
    workers = manifest_named("Deployment", "plumbline-dask-workers")
    (container,) = workers["spec"]["template"]["spec"]["containers"]
    assert container["image"] == daemon["image"]  # the same Plumbline version on both sides
    assert container["command"] == ["dask", "worker", "tcp://plumbline-dask-scheduler:8786"]
    args = container["args"]
    assert args[args.index("--nthreads") + 1] == "1"
    dask_limit = args[args.index("--memory-limit") + 1]  # Dask writes 1536MiB, Kubernetes 1536Mi
    assert quantity_bytes(dask_limit.removesuffix("B")) <= quantity_bytes(
        container["resources"]["limits"]["memory"])
    assert container["resources"]["requests"]["cpu"] == container["resources"]["limits"]["cpu"]
    for name in DASK_PODS:
        spec = dict(pod_specs())[name]
        assert spec["securityContext"]["runAsUser"] == image_uid()
        assert spec["automountServiceAccountToken"] is False
        (pod,) = spec["containers"]
        assert pod["securityContext"]["readOnlyRootFilesystem"] is True
        assert pod["securityContext"]["capabilities"]["drop"] == ["ALL"]
        assert "data" not in {v["name"] for v in spec["volumes"]}  # no database volume


def test_only_the_daemon_and_dask_pods_reach_the_dask_pods() -> None:
    policy = manifest_named("NetworkPolicy", "plumbline-dask")
    selected = policy["spec"]["podSelector"]["matchExpressions"][0]
    assert set(selected["values"]) == {"dask-scheduler", "dask-worker"}
    (rule,) = policy["spec"]["ingress"]
    (source,) = rule["from"]
    allowed = source["podSelector"]["matchExpressions"][0]["values"]
    assert set(allowed) == {"daemon", "dask-scheduler", "dask-worker"}
    assert policy["spec"]["policyTypes"] == ["Ingress"]


def test_container_image_carries_the_dask_extra() -> None:
    commands = " ".join(args for word, args in containerfile_instructions() if word == "RUN")
    assert "'.[dask]'" in commands and "'plumbline[dask]'" in commands
