"""End-to-end tests of the ``diffkit`` command on known-answer data in real file formats.

Each subcommand's JSON is validated against its schema in docs/json_schema/ and
compared with the library's own results; exit codes follow DESIGN.md
(0 done, 1 done but flagged, 2 usage or input error).
"""

import json
import os
import subprocess
import sys

import jsonschema
import numpy as np
import pytest

import diffkit
from diffkit.cli import main
from diffkit.synth import arrhenius_campaign, hopping_run, write_run

SCHEMAS = os.path.join(os.path.dirname(__file__), "..", "docs", "json_schema")
FRAMEWORK = {"B": 4, "S": 8}


def _schema(name):
    with open(os.path.join(SCHEMAS, f"{name}.json"), encoding="utf-8") as f:
        return json.load(f)


def _run_cli(argv, capsys):
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    fast = hopping_run(n_ions=16, n_frames=1500, frame_interval_ps=0.02, temperature_K=900,
                       Ea_eV=0.3, jump_distance_A=2.2, framework=FRAMEWORK, vibration_rms_A=0.1,
                       seed=1)
    stuck = hopping_run(n_ions=16, n_frames=400, frame_interval_ps=0.05, temperature_K=600,
                        Ea_eV=0.9, jump_distance_A=2.2, framework=FRAMEWORK, seed=2)
    camp = arrhenius_campaign(temperatures_K=(700, 850, 1000), Ea_eV=0.3, n_ions=16, n_frames=800,
                              frame_interval_ps=0.02, jump_distance_A=2.2, framework=FRAMEWORK,
                              seed=3)
    out = {"d": d, "fast_run": fast,
           "fast": write_run(fast, d, fmt="xdatcar", name="fast"),
           "stuck": write_run(stuck, d, fmt="extxyz", name="stuck"),
           "camp": [write_run(r, d / "camp", fmt="lammpsdump", name=f"T{int(T)}")
                    for T, r in zip(camp.temperatures_K, camp.runs)],
           "truth": camp}
    return out


def test_help_has_a_worked_example_for_every_subcommand(capsys):
    for sub in ("ingest", "inspect", "arrhenius", "plan", "campaign", "demo"):
        with pytest.raises(SystemExit) as exc:
            main([sub, "--help"])
        assert exc.value.code == 0
        assert f"diffkit {sub}" in capsys.readouterr().out  # the example line


def test_ingest_then_inspect_json_matches_library(files, capsys, tmp_path):
    h5 = str(tmp_path / "fast.h5")
    code, out, err = _run_cli(["ingest", files["fast"], "-o", h5, "--json"], capsys)
    assert code == 0, err
    data = json.loads(out)
    jsonschema.validate(data, _schema("ingest"))
    assert data["run"]["n_frames"] == 1500 and data["run"]["temperature_K"] == 900

    code, out, err = _run_cli(["inspect", h5, "--mobile", "Li", "--json"], capsys)
    data = json.loads(out)
    jsonschema.validate(data, _schema("inspect"))
    lib = diffkit.assess_run(diffkit.open_run(h5), "Li")
    assert data["assessment"]["verdict"] == lib.verdict
    assert data["assessment"]["diffusion"]["D_cm2_per_s"] == pytest.approx(lib.diffusion.D_cm2_per_s,
                                                                           rel=1e-12)
    assert code == (1 if lib.verdict == "inadequate" else 0)
    # and against the generator's exact answer (Einstein relation; REFERENCES.md)
    est = data["assessment"]["diffusion"]
    truth = files["fast_run"].truth.D_cm2_per_s
    assert abs(est["D_cm2_per_s"] - truth) < 4 * est["D_stderr_cm2_per_s"]


def test_reliable_run_exits_0_and_prints_verdict_first(files, capsys):
    code, out, err = _run_cli(["inspect", files["fast"], "--mobile", "Li"], capsys)
    assert code == 0, out + err
    lines = out.splitlines()
    assert lines[1].startswith("verdict: SOLID") or lines[1].startswith("verdict: TENTATIVE")
    assert lines[2].startswith("advice:") or lines[2].startswith("D(Li) =")
    assert "cm²/s" in out and "±" in out


def test_unreliable_run_exits_1_with_an_upper_bound(files, capsys):
    code, out, err = _run_cli(["inspect", files["stuck"], "--mobile", "Li", "--json"], capsys)
    assert code == 1
    data = json.loads(out)
    jsonschema.validate(data, _schema("inspect"))
    assert data["assessment"]["verdict"] == "inadequate"
    assert data["assessment"]["diffusion"]["is_upper_bound"] is True


def test_arrhenius_json_and_truth(files, capsys, tmp_path):
    plot = tmp_path / "arr.png"
    code, out, err = _run_cli(["arrhenius", *files["camp"], "--mobile", "Li", "--name", "demo-X",
                               "--json", "--plot", str(plot)], capsys)
    data = json.loads(out)
    jsonschema.validate(data, _schema("arrhenius"))
    s = data["summary"]
    truth = files["truth"]
    # Ea within 3 reported standard errors of the generator's exact value
    assert abs(s["Ea_eV"] - truth.Ea_eV) < 3 * s["Ea_stderr_eV"]
    assert s["haven_ratio"] == 1.0 and len(s["cautions"]) == 3
    assert plot.stat().st_size > 1000
    assert code in (0, 1)


def test_plan_json(capsys):
    code, out, err = _run_cli(["plan", "--Ea", "0.3", "--D", "1e-5", "--at", "900K", "--ions", "24",
                               "--jump-distance", "2.5", "--temperatures", "600:1100:100",
                               "--target-error", "30%", "--json"], capsys)
    assert code == 0, err
    data = json.loads(out)
    jsonschema.validate(data, _schema("plan"))
    lib = diffkit.plan_campaign(Ea_eV=0.3, candidate_temperatures_K=[600, 700, 800, 900, 1000, 1100],
                                n_ions=24, jump_distance_A=2.5, target_relative_error=0.3,
                                D_cm2_per_s=1e-5, at_temperature_K=900)
    assert data["total_length_ps"] == pytest.approx(lib.total_length_ps, rel=1e-9)


def test_campaign_and_status_json(files, capsys, tmp_path):
    manifest = tmp_path / "c.toml"
    runs = "\n".join(f'[[candidates.runs]]\nfiles = ["{p}"]\n' for p in files["camp"])
    manifest.write_text(f'title = "t"\n[settings]\nmobile = "Li"\n[[candidates]]\nname = "X"\n{runs}')
    out_dir = tmp_path / "out"
    code, out, err = _run_cli(["campaign", str(manifest), "--out", str(out_dir), "--workers", "1",
                               "--no-report", "--json"], capsys)
    data = json.loads(out)
    jsonschema.validate(data, _schema("campaign"))
    assert [r["status"] for r in data["runs"]] == ["done"] * 3
    code2, out, err = _run_cli(["campaign", str(manifest), "--out", str(out_dir), "--status",
                                "--json"], capsys)
    status = json.loads(out)
    jsonschema.validate(status, _schema("campaign-status"))
    assert {r["status"] for r in status["runs"]} == {"done"} and code2 == 0


@pytest.mark.parametrize("argv,needle", [
    (["inspect", "no/such/file.xdatcar", "--frame-interval", "20fs"], "no such file"),
    (["inspect", "__FAST__", "--mobile", "Na"], "'Na' is not in this trajectory"),
    (["ingest", "__FAST__", "-o", "x.h5", "--frame-interval=-2fs"], "frame_interval_ps must be"),
    (["ingest", "__FAST__", "-o", "x.h5", "--frame-interval", "2 parsecs"], "unknown unit"),
    (["plan", "--Ea", "0.3", "--D", "1e-5", "--ions", "4", "--jump-distance", "2",
      "--temperatures", "600", "--target-error", "10%"], "--D needs --at"),
    (["frobnicate"], "invalid choice"),
])
def test_bad_input_exits_2_with_one_line_and_no_traceback(files, tmp_path, argv, needle):
    argv = [files["fast"] if a == "__FAST__" else a for a in argv]
    proc = subprocess.run([sys.executable, "-m", "diffkit.cli", *argv], capture_output=True,
                          text=True, cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    assert needle in proc.stderr
    assert "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) <= 2  # argparse adds its usage line
    assert not (tmp_path / "x.h5").exists()


def test_traceback_flag_shows_the_traceback(files, tmp_path):
    proc = subprocess.run([sys.executable, "-m", "diffkit.cli", "--traceback", "inspect",
                           files["fast"], "--mobile", "Na"], capture_output=True, text=True)
    assert proc.returncode != 0 and "Traceback" in proc.stderr


def test_progress_is_silent_when_not_a_terminal(files, tmp_path):
    proc = subprocess.run([sys.executable, "-m", "diffkit.cli", "ingest", files["fast"], "-o",
                           str(tmp_path / "r.h5")], capture_output=True, text=True)
    assert proc.returncode == 0 and "\r" not in proc.stderr


def test_units_are_parsed_in_options():
    from diffkit.cli.options import temperature_K, time_ps, window_ps

    assert time_ps("20fs") == pytest.approx(0.02)
    assert time_ps("0.002ps") == pytest.approx(0.002)
    assert temperature_K("900K") == 900.0
    assert window_ps("2ps:20ps") == (2.0, 20.0)
    assert np.isclose(time_ps("1ns"), 1000.0)
