"""The whole job on built-in data, as ``sweepgen demo`` runs it.

Plan a shipped scenario, check it against its laser and generator, simulate the
atoms, export the sample table with its sidecar, upload it to an in-process
virtual instrument over a real loopback socket and verify it, and write a short
report (Markdown summary, the JSON documents, plots) into one folder. Nothing
here needs a network or real hardware.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

from sweepgen._atomic import atomic_write_text
from sweepgen._cli import si
from sweepgen._json import dumps

DEMO_SCENARIO = "rb87-chopped-oven"
DEMO_ATOMS = 10000
DEMO_SEED = 1


@dataclass
class DemoResult:
    directory: Path
    files: dict = field(default_factory=dict)     # label -> path
    ok: bool = True
    seconds: float = 0.0


def _write_json(path: Path, doc) -> Path:
    return atomic_write_text(path, dumps(doc))


def run(directory, *, scenario: str = DEMO_SCENARIO, atoms: int = DEMO_ATOMS, seed: int = DEMO_SEED,
        echo=print) -> DemoResult:
    """Run the demo into ``directory``; ``echo`` receives one line per step."""
    from sweepgen import drivers, plots, sidecar
    from sweepgen.checker import check, require_playable
    from sweepgen.drivers.base import Delivery
    from sweepgen.render import render
    from sweepgen.response import actuator_response
    from sweepgen.scenario import load_scenario
    from sweepgen.simulate import simulate
    from sweepgen.testing import upload_to_virtual_instrument

    start = time.perf_counter()
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    res = DemoResult(out)
    files = res.files

    sc = load_scenario(scenario)
    echo(f"scenario: {sc.title}")

    # 1. check (plans the sweep on the way)
    report = check(sc)
    plan = report.plan
    doc_plan = plan.to_json()
    files["plan"] = _write_json(out / "plan.json", doc_plan)
    files["check"] = _write_json(out / "check.json", report.to_json())
    echo(f"  plan:     chirp {si(doc_plan['chirp_span'], 'Hz')} in {si(doc_plan['chirp_duration'], 's')}, "
         f"{si(doc_plan['capture_velocity'], 'm/s')}"
         f" → {si(doc_plan['end_velocity'], 'm/s')} over {si(doc_plan['slowing_distance'], 'm')}")
    n_fail, n_warn = len(report.failures()), len(report.warnings())
    echo(f"  check:    {'ok' if report.ok else 'FAILED'} ({n_fail} failed, {n_warn} warning(s), "
         f"{len(report.findings) - n_fail - n_warn} passed)")
    require_playable(report)

    files["sweep plot"] = plots.plot_plan(plan, out / "sweep.png",
                                          response=actuator_response(plan, report.laser, report.generator))
    files["drive plot"] = plots.plot_drive(report, out / "drive.png")
    files["margins plot"] = plots.plot_check(report, out / "margins.png")

    # 2. simulate the atoms
    sim = simulate(sc, atoms=atoms, seed=seed, plan=plan)
    doc_sim = sim.to_json()
    files["simulation"] = _write_json(out / "simulate.json", doc_sim)
    files["velocity plot"] = plots.plot_simulation(sim, out / "velocities.png")
    echo(f"  simulate: {100 * doc_sim['captured_fraction']:.2f} % of {atoms} atoms captured "
         f"(light held at the start detuning: {100 * doc_sim['baseline_fixed_frequency_fraction']:.2f} %)")

    # 3. render and export through the file driver registry
    table = render(plan.schedule(), report.laser, report.generator, sc, rate_choice=report.rate)
    driver = drivers.load("csv", kind="file")()
    exported = driver.deliver(table, Delivery(destination=str(out / "table"), generator=report.generator,
                                              options={"name": "sweep"},
                                              sidecar=sidecar.provenance(sc, report.laser, report.generator)))
    files["table"] = Path(exported["paths"][0])
    files["sidecar"] = Path(exported["paths"][1])
    echo(f"  export:   {table.info.count} samples at {si(table.info.sample_rate, 'Sa/s')} "
         f"(sha256 {table.sha256[:12]}…)")

    # 4. upload to an in-process virtual instrument on a loopback socket, verify, leave unarmed
    up = upload_to_virtual_instrument(table, report.generator)
    files["upload"] = _write_json(out / "upload.json", up)
    verified = bool((up.get("verification") or {}).get("ok"))
    res.ok = report.ok and verified
    echo(f"  upload:   {up.get('bytes', 0)} bytes to the virtual instrument, "
         f"verification {'passed' if verified else 'FAILED'}, output left off (no --arm)")

    files["summary"] = _summary(out, sc, report, doc_plan, doc_sim, table, exported, up, verified)
    res.seconds = time.perf_counter() - start
    return res


def _summary(out, sc, report, doc_plan, doc_sim, table, exported, up, verified) -> Path:
    lines = [f"# sweepgen demo: {sc.title}", "",
             f"Species `{sc.species.key}`, laser `{report.laser.key}`, generator `{report.generator.key}`.",
             "", "## The sweep (`plan.json`)", "", "| quantity | value |", "|---|---|"]
    rows = [("capture (start) velocity", si(doc_plan["capture_velocity"], "m/s")),
            ("end velocity", si(doc_plan["end_velocity"], "m/s")),
            ("margin η", f"{doc_plan['margin']:g}"),
            ("design deceleration", si(doc_plan["deceleration_max"], "m/s²")),
            ("start / end detuning", f"{si(doc_plan['start_detuning'], 'Hz')} / {si(doc_plan['end_detuning'], 'Hz')}"),
            ("chirp span, largest rate", f"{si(doc_plan['chirp_span'], 'Hz')}, {si(doc_plan['chirp_rate_max'], 'Hz/s')}"),
            ("chirp duration", si(doc_plan["chirp_duration"], "s")),
            ("slowing distance", si(doc_plan["slowing_distance"], "m")),
            ("chirp start / arrival after trigger",
             f"{si(doc_plan['start_time'], 's')} / {si(doc_plan['arrival_time'], 's')}"),
            ("photons per atom", f"{doc_plan['photons_per_atom']:.4g}")]
    lines += [f"| {a} | {b} |" for a, b in rows]
    lines += ["", "![sweep](sweep.png)", "", "## The check (`check.json`)", "",
              f"{'No rule fails' if report.ok else 'Some rules FAIL'}: "
              f"{len(report.failures())} failed, {len(report.warnings())} warning(s).", "",
              "| status | rule | value | limit | margin |", "|---|---|---|---|---|"]
    for f in report.ordered():
        margin = "" if f.margin is None else f"{100 * f.margin:.0f} %"
        value = "" if f.value is None else si(f.value, f.unit)
        limit = "" if f.limit is None else si(f.limit, f.unit)
        lines.append(f"| {f.status} | {f.rule} | {value} | {limit} | {margin} |")
    lines += ["", "![drive](drive.png)", "", "![margins](margins.png)", "",
              "## The atoms (`simulate.json`)", "",
              f"{doc_sim['atoms']} atoms, seed {doc_sim['seed']}: "
              f"{100 * doc_sim['captured_fraction']:.2f} % reach the target at or below "
              f"{sc.target.capture_velocity:g} m/s (without light {100 * doc_sim['baseline_no_light_fraction']:.2f} %, "
              f"light held at the start detuning {100 * doc_sim['baseline_fixed_frequency_fraction']:.2f} %); "
              f"{100 * doc_sim['band_fraction']:.2f} % started inside the chirp's band.", "",
              "![velocities](velocities.png)", "",
              "## The table and the upload", "",
              f"- `{Path(exported['paths'][0]).relative_to(out)}`: {table.info.count} samples at "
              f"{si(table.info.sample_rate, 'Sa/s')}, sidecar `{Path(exported['paths'][1]).relative_to(out)}` "
              f"(SHA-256 `{table.sha256}`).",
              f"- Uploaded to the virtual instrument over a loopback socket: {up.get('bytes', 0)} bytes, "
              f"verification {'passed' if verified else 'FAILED'} (`upload.json`). The output was left off.",
              "", "Before connecting a real laser: look at the generator output on an oscilloscope and at the "
              "laser frequency on a wavemeter, and follow your laboratory's laser-safety rules.", ""]
    return atomic_write_text(out / "summary.md", "\n".join(lines))
