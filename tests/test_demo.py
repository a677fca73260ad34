"""``sweepgen demo``: the whole job on built-in data, end to end (loopback socket, files, plots)."""

import hashlib
import json
import re

import pytest

from conftest import run_cli

PNG = b"\x89PNG\r\n\x1a\n"


@pytest.mark.slow
def test_demo_writes_the_whole_report(tmp_path):
    out = tmp_path / "demo"
    result = run_cli("demo", out)
    assert result.exit_code == 0, result.output
    for name in ("sweep.png", "drive.png", "headroom.png", "velocities.png"):
        assert (out / name).read_bytes()[:8] == PNG
    plan = json.loads((out / "plan.json").read_text())
    check = json.loads((out / "check.json").read_text())
    sim = json.loads((out / "simulate.json").read_text())
    upload = json.loads((out / "upload.json").read_text())
    sidecar = json.loads((out / "table" / "sweep.csv.json").read_text())
    assert check["ok"] is True
    assert upload["verification"]["ok"] is True and upload["armed"] is False
    # the table uploaded is the table exported: same sample count and rate
    assert upload["table"]["count"] == sidecar["count"]
    assert plan["chirp_span"] > 0
    # the chirp captures far more than the light held at the start detuning (why the method exists)
    assert sim["captured_fraction"] > 10 * max(sim["baseline_fixed_frequency_fraction"], 1e-3)
    summary = (out / "summary.md").read_text()
    assert "verification passed" in summary and "![sweep](sweep.png)" in summary
    assert str(out) in result.output
    # a user who runs sha256sum on the table finds that digest in the report and the console, named as
    # the file's; the digest of the codes is named as such (table_sha256)
    file_sha = hashlib.sha256((out / "table" / "sweep.csv").read_bytes()).hexdigest()
    assert re.search(rf"SHA-256 of the file[^\n]*`{file_sha}`", summary)
    assert f"SHA-256 of the file {file_sha[:12]}" in result.stdout
    assert re.search(rf"`table_sha256`[^\n]*`{upload['table_sha256']}`", summary)
    assert upload["table_sha256"] == sidecar["table_sha256"] != file_sha
    assert all(digest in (file_sha, upload["table_sha256"]) for digest in re.findall(r"[0-9a-f]{64}", summary))
    # the numbers beside the velocity plot are the JSON's
    assert (f"share of all {sim['atoms']} atoms the source emitted: the green bars (captured) add up to "
            f"{100 * sim['captured_fraction']:.2f} %") in summary
