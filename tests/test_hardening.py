"""Hostile input, interruptions and races: one line, a non-zero exit, nothing lost.

Each case runs a command as a user would (``designer.cli.main`` with an argument list,
or the installed console script in a subprocess where the process itself matters:
memory, signals, a second run) and checks the exit code, exactly one error line on
stderr, no traceback, and that every file the user had is byte-for-byte unchanged
(SHA-256 of each file before and after).  Expected behaviour is the project's own
contract (README: "Nothing is overwritten without --overwrite", exit codes);
common practice, no source.  The failure-mode table in DEVELOPERS.md lists these.
"""

import hashlib
import io
import json
import os
import signal
import stat
import subprocess
import sys
import time
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import pytest

VELOMATCH = str(Path(sys.executable).with_name("velomatch"))

FILM = """\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 30.0
[sample]
family = "membrane"
material = {material}
thickness_nm = 100.0
pattern = "none"
[path]
x_nm = 0.0
{extra}"""

GRATING = """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 800.0
[sample]
family = "grating"
material = { n = 1.45 }
sides = 1
period_nm = "phase-matched"
duty_cycle = 0.5
tooth_height_nm = 300.0
substrate = true
[path]
offset_nm = 50.0
length_um = 10.0
[solver]
grid_step_nm = STEP
"""


def film(tmp_path, name="film.toml", material="{ n = 2.0 }", extra=""):
    path = tmp_path / name
    path.write_text(FILM.format(material=material, extra=extra))
    return path


def cli(*argv):
    """(exit code, stdout, stderr) of ``velomatch ARGV`` run in this process."""
    from designer.cli import main

    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        try:
            rc = main([str(a) for a in argv])
        except SystemExit as exc:   # argparse
            rc = exc.code
    return rc, out.getvalue(), err.getvalue()


def snapshot(folder) -> dict:
    """{relative path: sha256} of every file under ``folder`` (except the empty lock
    file ``.velomatch.lock`` that a locked output folder keeps)."""
    from designer.io import LOCK_NAME

    folder = Path(folder)
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != LOCK_NAME}


def refused(result, *words, rc=2):
    code, _, err = result
    assert code == rc, err
    assert "Traceback" not in err, err
    errors = [line for line in err.splitlines() if ": error: " in line]
    assert len(errors) == 1, err
    for w in words:
        assert w in errors[0], errors[0]
    return errors[0]


def one_line(result, *words, rc=2):
    """Refused with exactly one line on stderr (refusals before any work: no progress)."""
    line = refused(result, *words, rc=rc)
    assert result[2].strip() == line, result[2]
    return line


# ---------------------------------------------------------------------------------
# 1. outputs: never overwritten without --overwrite, never an input, checked first
# ---------------------------------------------------------------------------------
def test_evaluate_out_onto_its_own_spec_is_refused(tmp_path):
    spec = film(tmp_path)
    before = snapshot(tmp_path)
    one_line(cli("evaluate", spec, "--json", "--out", spec), "input")
    one_line(cli("evaluate", spec, "--json", "--out", spec, "--overwrite"), "input")
    assert snapshot(tmp_path) == before


def test_existing_outputs_need_overwrite(tmp_path):
    spec = film(tmp_path)
    for name in ("r.json", "p.png", "r.html", "s.png"):
        (tmp_path / name).write_text("mine\n")
    before = snapshot(tmp_path)
    one_line(cli("evaluate", spec, "--json", "--out", tmp_path / "r.json"), "--overwrite")
    one_line(cli("evaluate", spec, "--json", "--plot", tmp_path / "p.png"), "--overwrite")
    one_line(cli("evaluate", spec, "--json", "--report", tmp_path / "r.html"), "--overwrite")
    one_line(cli("spectrum", spec, "--json", "--plot", tmp_path / "s.png"), "--overwrite")
    assert snapshot(tmp_path) == before
    rc, out, err = cli("evaluate", spec, "--json", "--out", tmp_path / "r.json", "--overwrite")
    assert rc == 0, err
    assert json.loads((tmp_path / "r.json").read_text())["sample"]["family"] == "membrane"


@pytest.mark.parametrize("flag,name,words", [
    ("--plot", "out.xyz", [".png"]),
    ("--out", "FOLDER", ["is a folder"]),
    ("--out", "/proc/velomatch.json", ["/proc"]),
    ("--plot", "/proc/self/x.png", ["/proc"]),
    ("--out", "film.toml/x.json", ["is a file, not a folder"]),
    ("--report", "film.toml/r.html", ["is a file, not a folder"]),
])
def test_bad_output_paths_fail_before_any_work(tmp_path, flag, name, words):
    spec = film(tmp_path)
    (tmp_path / "FOLDER").mkdir()
    target = name if name.startswith("/") else tmp_path / name
    before = snapshot(tmp_path)
    # --out r.json as well: nothing may be written when another output is refused
    args = ["evaluate", spec, "--json", flag, target]
    if flag != "--out":
        args += ["--out", tmp_path / "r.json"]
    one_line(cli(*args), *words)
    assert snapshot(tmp_path) == before


def test_a_material_table_is_never_an_output(tmp_path):
    (tmp_path / "nk.csv").write_text("wavelength_nm, n, k\n700, 2.0, 0\n900, 2.0, 0\n")
    spec = film(tmp_path, material='{ file = "nk.csv" }')
    before = snapshot(tmp_path)
    one_line(cli("evaluate", spec, "--json", "--out", tmp_path / "nk.csv", "--overwrite"),
             "input", "nk.csv")
    assert snapshot(tmp_path) == before


def test_export_with_a_bad_preview_writes_nothing(tmp_path):
    spec = film(tmp_path)
    before = snapshot(tmp_path)
    one_line(cli("export", spec, "--json", "--out", tmp_path / "E.gds", "--preview",
                 "/proc/x.svg"), "/proc")
    one_line(cli("export", spec, "--json", "--out", tmp_path / "E.gds", "--preview",
                 tmp_path / "p.xyz"), ".svg")
    one_line(cli("export", spec, "--json", "--out", spec, "--format", "gds", "--overwrite"),
             "input")
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("command", ["design", "sweep", "compare"])
def test_output_folders_under_a_file_or_in_proc(tmp_path, command):
    spec = film(tmp_path, extra="[optimize]\nvariables = { thickness_nm = [50.0, 150.0] }\n")
    extra = ["--vary", "laser.angle_deg=0:10:2"] if command == "sweep" else []
    before = snapshot(tmp_path)
    for out in (spec / "run", "/proc/velomatch-run", spec):
        refused(cli(command, spec, "--out", out, *extra))
    assert snapshot(tmp_path) == before


def test_crosscheck_and_demo_outputs_are_checked_first(tmp_path):
    spec = film(tmp_path)
    before = snapshot(tmp_path)
    one_line(cli("crosscheck", spec, "--json", "--plot", "/proc/cc.png"), "/proc")
    one_line(cli("crosscheck", spec, "--json", "--plot", spec / "cc.png"), "not a folder")
    one_line(cli("demo", "--out", "/proc/velomatch-demo"), "/proc")
    one_line(cli("demo", "--out", spec), "not a folder")
    assert snapshot(tmp_path) == before


def test_written_files_follow_the_umask(tmp_path):
    from designer import io as vio

    old = os.umask(0o022)
    try:
        target = tmp_path / "a.json"
        target.write_text("{}")
        os.chmod(target, 0o600)
        vio.write_json(target, {"x": 1})          # replacing a 0600 file
        vio.write_atomic(tmp_path / "b.txt", "b")  # a new file
        mode_a = stat.S_IMODE(target.stat().st_mode)
        mode_b = stat.S_IMODE((tmp_path / "b.txt").stat().st_mode)
        os.umask(0o077)
        vio.write_atomic(tmp_path / "c.txt", "c")
        mode_c = stat.S_IMODE((tmp_path / "c.txt").stat().st_mode)
    finally:
        os.umask(old)
    assert (mode_a, mode_b, mode_c) == (0o644, 0o644, 0o600)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


# ---------------------------------------------------------------------------------
# 2. cost before any solve; bounded input files; physical ranges
# ---------------------------------------------------------------------------------
def test_memory_refusal_is_quick_and_small(tmp_path):
    """A grid far beyond the machine's memory: refused in seconds, under 1 GB resident,
    naming the estimate, the available memory and the key to change."""
    spec = tmp_path / "g.toml"
    spec.write_text(GRATING.replace("STEP", "0.01"))
    probe = ("import resource, subprocess, sys, time; t = time.monotonic(); "
             "r = subprocess.run(sys.argv[1:], capture_output=True, text=True); "
             "print(r.returncode, time.monotonic() - t, "
             "resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss); "
             "print(r.stderr, end='')")
    got = subprocess.run([sys.executable, "-c", probe, VELOMATCH, "evaluate", str(spec),
                          "--json"], capture_output=True, text=True, timeout=120)
    head, *err = got.stdout.splitlines()
    rc, seconds, rss_kb = head.split()
    errors = [line for line in err if ": error: " in line]
    assert int(rc) == 2 and len(errors) == 1 and errors[0] == err[-1], got.stdout
    assert "Traceback" not in got.stdout
    assert "grid_step_nm" in err[-1] and "available" in err[-1] and "--force" in err[-1]
    assert float(seconds) < 30.0          # imports included, on a loaded 2-core machine
    assert int(rss_kb) < 1_000_000        # ru_maxrss is in kB on Linux


def test_force_overrides_the_memory_refusal(tmp_path, monkeypatch):
    from designer import cost

    monkeypatch.setattr(cost, "available_memory", lambda: (1e6, "a test's small machine"))
    spec = film(tmp_path, extra='[solver]\nmethod = "fdfd"\ngrid_step_nm = 5.0\n'
                                "refine = false\n")
    refused(cli("evaluate", spec, "--json"), "small machine", "--force")
    rc, out, err = cli("evaluate", spec, "--json", "--force")
    assert rc == 0, err
    assert "VELOMATCH_FORCE" not in os.environ   # --force does not outlive the command


def test_cost_model_brackets_the_measured_superlu_fill():
    """The fill model against SciPy SuperLU on the operator it models (scipy itself is
    the reference; tolerance: within 0.8 to 2 times the measured fill)."""
    import math

    import numpy as np
    from scipy import constants

    from designer.cost import estimate
    from solvers.fdfd import FdfdProblem, PlaneWave, Pml
    from solvers.fdfd.linsolve import factorize
    from solvers.fdfd.solver import _system
    from solvers.grid import Grid

    lam = 1e-6
    for nx, nz in ((8, 3000), (120, 600)):
        d = lam / 60
        g = Grid(nx, nz, d, d, z0=-nz / 2 * d)
        prob = FdfdProblem(g, 2 * math.pi * constants.c / lam,
                           Pml(0, max(20, math.ceil(0.55 * lam / d))), PlaneWave(0.2))
        eps = np.ones(g.shape)
        eps[:, nz // 2 - nz // 8:nz // 2] = 4.0
        measured = factorize(_system(prob).op.matrix(eps, eps)).nnz
        assert 0.8 < estimate(nx, nz).lu_entries / measured < 2.0, (nx, nz, measured)


def test_spec_files_that_are_not_small_text(tmp_path):
    (tmp_path / "utf16.toml").write_bytes("[beam]\nvoltage_kV = 1.0\n".encode("utf-16"))
    (tmp_path / "bin.toml").write_bytes(bytes(range(256)))
    (tmp_path / "deep.toml").write_text("a = " + "[" * 5000 + "]" * 5000 + "\n")
    (tmp_path / "big.toml").write_bytes(b"#" * (17 * 2**20))
    cases = {"/dev/zero": "regular file", tmp_path / "utf16.toml": "UTF-16",
             tmp_path / "bin.toml": "binary", tmp_path / "deep.toml": "nested",
             tmp_path / "big.toml": "limit", tmp_path: "folder"}
    for path, word in cases.items():
        t = time.monotonic()
        one_line(cli("evaluate", path, "--json"), word)
        assert time.monotonic() - t < 5.0


@pytest.mark.parametrize("edits,words", [
    ({"wavelength_nm = 800.0": "wavelength_nm = 1e-6"}, ["laser.wavelength_nm"]),
    ({"wavelength_nm = 800.0": "wavelength_nm = 1e12"}, ["laser.wavelength_nm"]),
    ({"voltage_kV = 100.0": "voltage_kV = 1e-300"}, ["beam.voltage_kV"]),
    ({"{ n = 2.0 }": "{ eps = 0.0 }"}, ["sample.material", "eps"]),
    ({"{ n = 2.0 }": "{ n = 1e9 }"}, ["sample.material"]),
    ({"{ n = 2.0 }": "{ n = 2.0 }\n[spectrum]\nzlp_fwhm_eV = 1e-300"},
     ["spectrum.zlp_fwhm_eV"]),
    # far outside the catalogue entry's data (0.31-5.5 um): an error, not a warning
    ({"{ n = 2.0 }": '"silicon_nitride"', "wavelength_nm = 800.0": "wavelength_nm = 1e6"},
     ["sample.material", "outside the data"]),
])
def test_physical_ranges(tmp_path, edits, words):
    text = FILM.format(material="{ n = 2.0 }", extra="")
    for old, new in edits.items():
        assert old in text
        text = text.replace(old, new, 1)
    spec = tmp_path / "s.toml"
    spec.write_text(text)
    one_line(cli("evaluate", spec, "--json"), *words)


def test_huge_values_are_not_echoed_whole(tmp_path):
    spec = tmp_path / "s.toml"
    spec.write_text(FILM.format(material="{ n = 2.0 }", extra="")
                    .replace("thickness_nm = 100.0",
                             "thickness_nm = [" + ", ".join(["1.0"] * 200_000) + "]"))
    line = one_line(cli("evaluate", spec, "--json"), "sample.thickness_nm")
    assert len(line) < 400


@pytest.mark.parametrize("args,word", [
    (["--voltage-kV", "1e-30"], "--voltage-kV"),
    (["--voltage-kV", "100", "--wavelength-nm", "inf"], "--wavelength-nm"),
    (["--voltage-kV", "100", "--index", "nan"], "--index"),
    (["--voltage-kV", "100", "--index", "-2"], "--index"),
    (["--voltage-kV", "100", "--index", "0"], "--index"),
    (["--voltage-kV", "100", "--index", "inf"], "--index"),
])
def test_beam_options_out_of_range(args, word):
    one_line(cli("beam", *args, "--json"), word)


@pytest.mark.parametrize("value", ["1e300", "1e-300", "inf", "nan", "-5"])
def test_materials_wavelength_out_of_range(value):
    one_line(cli("materials", "--wavelength-nm", value, "--json"), "--wavelength-nm")


# ---------------------------------------------------------------------------------
# 3. finite results or failure
# ---------------------------------------------------------------------------------
def test_fine_fdfd_film_is_finite_and_matches_the_exact_stack(tmp_path):
    """At a 0.5 nm step the evanescent Floquet orders of the 4-cell Bloch cell have
    |Im kz| large enough to overflow exp() across the box (NaN before the fix).
    Reference: the exact transfer-matrix solution of the same film (solvers.layers,
    checked against M. Born & E. Wolf, Principles of Optics, ch. 1); tolerance 1 %."""
    spec = film(tmp_path, extra='[solver]\nmethod = "fdfd"\ngrid_step_nm = 0.5\n'
                                "refine = false\n")
    exact = film(tmp_path, "exact.toml", extra='[solver]\nmethod = "layers"\n')
    rc, out, err = cli("evaluate", spec, "--json")
    assert rc == 0, err
    rc2, out2, _ = cli("evaluate", exact, "--json")
    i_fdfd = complex(*json.loads(out)["coupling"]["integral_V"])
    i_exact = complex(*json.loads(out2)["coupling"]["integral_V"])
    assert abs(i_fdfd - i_exact) < 0.01 * abs(i_exact)


def test_non_finite_results_never_pass():
    import math

    from designer.errors import NumericalError
    from designer.io import require_finite

    require_finite({"a": [1.0, 2.0], "b": {"c": 3}})
    for bad in (math.nan, math.inf, complex(1, math.nan)):
        with pytest.raises(NumericalError):
            require_finite({"coupling": {"beta_c": bad}})


# ---------------------------------------------------------------------------------
# 4. files named by a spec
# ---------------------------------------------------------------------------------
def test_relative_material_file_survives_into_design_toml(tmp_path, monkeypatch):
    (tmp_path / "specs").mkdir()
    (tmp_path / "specs" / "nk.csv").write_text("wavelength_nm, n, k\n600, 2.0, 0\n"
                                               "1000, 2.0, 0\n")
    spec = film(tmp_path / "specs", material='{ file = "nk.csv" }',
                extra="[optimize]\nvariables = { thickness_nm = [50.0, 150.0] }\n"
                      "iterations = 2\n")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    rc, out, err = cli("design", spec, "--out", tmp_path / "run")
    assert rc == 0, err
    rc, out, err = cli("evaluate", tmp_path / "run" / "design.toml", "--json")
    assert rc == 0, err


def test_file_keys_read_regular_files_without_echoing_content(tmp_path):
    secret = "wavelength_nm, n\n700, 2\nTOPSECRET-LINE, 3\n"
    (tmp_path / "nk.csv").write_text(secret)
    spec = film(tmp_path, material='{ file = "nk.csv" }')
    line = one_line(cli("evaluate", spec, "--json"), "nk.csv:3")
    assert "TOPSECRET" not in line
    spec = film(tmp_path, "dev.toml", material='{ file = "/dev/zero" }')
    one_line(cli("evaluate", spec, "--json"), "regular file")


def test_text_density_file_is_named_as_text(tmp_path):
    (tmp_path / "rho.txt").write_text("0 1\n1 0\n")
    spec = tmp_path / "ff.toml"
    spec.write_text(GRATING.replace("STEP", "20.0").replace("[path]", """\
[sample.freeform]
z_nm = [0.0, 300.0]
density_file = "rho.txt"
pixel_nm = [10.0, 10.0]
origin_nm = [0.0, 0.0]
[path]"""))
    line = one_line(cli("evaluate", spec, "--json"), "sample.freeform.density_file")
    assert "pickle" not in line and "text" in line and ".npy" in line


# ---------------------------------------------------------------------------------
# 5. output folders are locked for the whole run
# ---------------------------------------------------------------------------------
HOLD = """\
import sys, time
from designer import io as vio
vio.open_output_dir(sys.argv[1])
print("locked", flush=True)
sys.stdin.read()
"""


def test_second_run_into_a_locked_folder_names_the_holder(tmp_path):
    spec = film(tmp_path, extra="[optimize]\nvariables = { thickness_nm = [50.0, 150.0] }\n")
    out = tmp_path / "run"
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(out)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        before = snapshot(out)
        line = refused(cli("design", spec, "--out", out), "in use", f"pid {holder.pid}")
        assert "velomatch" in line
        refused(cli("sweep", spec, "--vary", "laser.angle_deg=0:10:2", "--out", out),
                "in use")
        assert snapshot(out) == before
    finally:
        holder.communicate("", timeout=30)
    assert holder.returncode == 0


def test_output_session_releases_only_its_own_locks(tmp_path):
    from designer import io as vio

    def held():
        return [folder for _, folder, _ in vio._HELD]

    before = held()   # other tests in this process may hold folders of their own
    with vio.output_session():
        vio.open_output_dir(tmp_path / "outer")
        with vio.output_session():
            vio.open_output_dir(tmp_path / "inner")
        assert not (tmp_path / "inner").exists()     # created, left empty: removed
        assert held() == before + [tmp_path / "outer"]
    assert held() == before and not (tmp_path / "outer").exists()


# ---------------------------------------------------------------------------------
# 6. one line instead of a traceback
# ---------------------------------------------------------------------------------
def test_grid_so_coarse_that_both_error_grids_coincide(tmp_path):
    spec = tmp_path / "g.toml"
    spec.write_text(GRATING.replace("STEP", "200.0"))
    rc, out, err = cli("evaluate", spec, "--json")
    assert rc == 0, err
    assert json.loads(out)["coupling"]["relative_error_estimate"] is None


def test_sweep_over_coarse_grid_steps_completes(tmp_path):
    spec = tmp_path / "g.toml"
    spec.write_text(GRATING.replace("STEP", "100.0"))
    rc, out, err = cli("sweep", spec, "--vary", "solver.grid_step_nm=100:200:2", "--out",
                       tmp_path / "sw", "--workers", "0")
    assert rc == 0 and "Traceback" not in err, err
    points = json.loads((tmp_path / "sw" / "sweep.json").read_text())["points"]
    assert len(points) == 2 and not any(p.get("error") for p in points)


def test_coarse_fdfd_film_is_one_line(tmp_path):
    spec = film(tmp_path, extra='[solver]\nmethod = "fdfd"\ngrid_step_nm = 100.0\n')
    refused(cli("evaluate", spec, "--json"), "cells per wavelength", "[solver] force")


def test_corrupted_checkpoint_on_resume(tmp_path):
    spec = film(tmp_path, extra="[optimize]\nvariables = { thickness_nm = [50.0, 150.0] }\n")
    out = tmp_path / "run"
    out.mkdir()
    for text in ("{not json", '{"spec_sha256": 1}', "\x00\x01"):
        (out / "checkpoint.json").write_text(text)
        before = snapshot(tmp_path)
        refused(cli("design", spec, "--out", out, "--resume"), "checkpoint")
        assert snapshot(tmp_path) == before


def test_refused_runs_leave_no_empty_folder(tmp_path):
    spec = film(tmp_path, extra="[optimize]\nvariables = { thickness_nm = [50.0, 150.0] }\n")
    bad = tmp_path / "bad.toml"
    bad.write_text("[beam\n")
    refused(cli("design", spec, "--out", tmp_path / "missing", "--resume"), "resume")
    refused(cli("compare", spec, bad, "--out", tmp_path / "cmp"), "malformed")
    refused(cli("sweep", bad, "--vary", "laser.angle_deg=0:10:2", "--out", tmp_path / "sw"))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml", "film.toml"]


# ---------------------------------------------------------------------------------
# 7. pool workers die with their parent; Ctrl-C does not wait for points in flight
# ---------------------------------------------------------------------------------
def _children(pid):
    import psutil

    try:
        return psutil.Process(pid).children(recursive=True)
    except psutil.NoSuchProcess:
        return []


def _pooled_sweep(tmp_path):
    spec = film(tmp_path, material='"silicon_nitride"')
    proc = subprocess.Popen([VELOMATCH, "sweep", str(spec), "--vary",
                             "laser.angle_deg=0:40:40", "--out", str(tmp_path / "sw"),
                             "--workers", "2"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True, start_new_session=True)
    deadline = time.monotonic() + 60
    while len([c for c in _children(proc.pid) if "python" in " ".join(c.cmdline())]) < 2:
        assert time.monotonic() < deadline and proc.poll() is None
        time.sleep(0.2)
    time.sleep(2.0)   # the workers have started and are importing or computing
    return proc


@pytest.mark.slow
def test_pool_workers_die_with_a_killed_sweep(tmp_path):
    import psutil

    proc = _pooled_sweep(tmp_path)
    workers = _children(proc.pid)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=10)
    gone, alive = psutil.wait_procs(workers, timeout=10)
    for p in alive:
        p.kill()
    assert not alive, [p.cmdline() for p in alive]


@pytest.mark.slow
def test_interrupted_pooled_sweep_stops_at_once(tmp_path):
    import psutil

    proc = _pooled_sweep(tmp_path)
    workers = _children(proc.pid)
    t = time.monotonic()
    os.kill(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=30)
    waited = time.monotonic() - t
    _, alive = psutil.wait_procs(workers, timeout=5)
    for p in alive:
        p.kill()
    assert proc.returncode == 130 and "Traceback" not in err, err
    assert waited < 6.0 and not alive
