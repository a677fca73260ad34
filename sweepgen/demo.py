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
from sweepgen._format import si
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
    from sweepgen.scenario import load_scenario

    start = time.perf_counter()
    out = Path(directory)
    out.mkdir(exist_ok=True)          # the folder, not its parents
    res = DemoResult(out)
    sc = load_scenario(scenario)
    echo(f"scenario: {sc.title}")
    pb = _check(sc, out, res.files, echo)
    doc_sim = _simulate(pb, out, res.files, echo, atoms=atoms, seed=seed)
    exported = _export(pb, out, res.files, echo)
    uploaded = _upload(pb, out, res.files, echo)
    res.ok = pb.ok and uploaded.verified
    res.files["summary"] = _summary(out, pb, doc_sim, exported, uploaded)
    res.seconds = time.perf_counter() - start
    return res


def _check(sc, out: Path, files: dict, echo):
    """1. Plan and check through the playback service; the plots of the sweep, the drive and the headroom."""
    import numpy as np

    from sweepgen import playback, plots

    pb = playback.prepare(sc)
    report = pb.report
    doc_plan = pb.plan.to_json()
    files["plan"] = _write_json(out / "plan.json", doc_plan)
    files["check"] = _write_json(out / "check.json", pb.to_json())
    echo(f"  plan:     chirp {si(doc_plan['chirp_span'], 'Hz')} in {si(doc_plan['chirp_duration'], 's')}, "
         f"{si(doc_plan['start_velocity'], 'm/s')}"
         f" → {si(doc_plan['end_velocity'], 'm/s')} over {si(doc_plan['slowing_distance'], 'm')}")
    n_fail, n_warn = len(report.failures()), len(report.warnings())
    echo(f"  check:    {'ok' if report.ok else 'FAILED'} ({n_fail} failed, {n_warn} warning(s), "
         f"{len(report.findings) - n_fail - n_warn} passed)")
    pb.require_playable()
    tracking = report.tracking            # the actuator as the checker simulated it, at the rate and codes played
    when = report.played_times()          # on the trigger's axis, as the plan
    order = np.argsort(when, kind="stable")
    files["sweep plot"] = plots.plot_plan(pb.plan, out / "sweep.png", response=(when[order], tracking.actual[order]))
    files["drive plot"] = plots.plot_drive(report, out / "drive.png")
    files["headroom plot"] = plots.plot_check(report, out / "headroom.png")
    return pb


def _simulate(pb, out: Path, files: dict, echo, *, atoms: int, seed: int) -> dict:
    """2. Simulate the atoms through what the hardware plays (and, beside it, the plan itself)."""
    from sweepgen import plots
    from sweepgen.playback import played_from
    from sweepgen.simulate import simulate

    sim = simulate(pb.scenario, atoms=atoms, seed=seed, plan=pb.plan, played=played_from(pb))
    doc_sim = sim.to_json()
    files["simulation"] = _write_json(out / "simulate.json", doc_sim)
    files["velocity plot"] = plots.plot_simulation(sim, out / "velocities.png")
    ideal = doc_sim.get("ideal_captured_fraction")
    echo(f"  simulate: {100 * doc_sim['captured_fraction']:.2f} % of {atoms} atoms captured as played"
         + (f" ({100 * ideal:.2f} % with the plan itself)" if ideal is not None else "")
         + f", light held at the start detuning: {100 * doc_sim['baseline_fixed_frequency_fraction']:.2f} %")
    return doc_sim


def _export(pb, out: Path, files: dict, echo):
    """3. Render and export through the file driver registry."""
    from sweepgen import playback

    exported = pb.export(playback.file_format("csv"), out / "table", {"name": "sweep"})
    files["table"] = Path(exported.report["paths"][0])
    files["sidecar"] = Path(exported.report["paths"][1])
    table = pb.table()
    echo(f"  export:   {table.info.count} samples at {si(table.info.sample_rate, 'Sa/s')} to "
         f"{files['table'].relative_to(out)} (SHA-256 of the file {exported.report['sha256'][:12]}…)")
    return exported


def _upload(pb, out: Path, files: dict, echo):
    """4. Upload to an in-process virtual instrument on a loopback socket, verify, leave unarmed."""
    from sweepgen.testing import instrument_server

    with instrument_server(pb.generator) as server:
        uploaded = pb.upload(pb.link(resource=server.resource))
        doc = {**uploaded.to_json(), "instrument": {"outputs_on": server.instrument.outputs_on,
                                                    "traces": sorted(server.instrument.traces)}}
    files["upload"] = _write_json(out / "upload.json", doc)
    echo(f"  upload:   {uploaded.report.get('bytes', 0)} bytes to the virtual instrument, "
         f"verification {'passed' if uploaded.verified else 'FAILED'}, output left off (no --arm)")
    return uploaded


def _atoms_section(sc, doc_sim) -> list[str]:
    """The summary's lines on the simulation: what was played, captured, how cold, what was lost."""
    lost = doc_sim["lost_by_reason"]
    ideal = doc_sim.get("ideal_captured_fraction")
    return ["## The atoms (`simulate.json`)", "",
            f"{doc_sim['atoms']} atoms, seed {doc_sim['seed']}, through {doc_sim['played']['reason']}: "
            f"{100 * doc_sim['captured_fraction']:.2f} % reach the target at or below "
            f"{sc.target.capture_velocity:g} m/s"
            + (f" ({100 * ideal:.2f} % through the plan itself)" if ideal is not None else "")
            + f" (without light {100 * doc_sim['baseline_no_light_fraction']:.2f} %, "
            f"light held at the start detuning {100 * doc_sim['baseline_fixed_frequency_fraction']:.2f} %); "
            f"{100 * doc_sim['band_fraction']:.2f} % started inside the chirp's band.", "",
            f"The captured atoms arrive at {si(doc_sim['final_velocity_mean'], 'm/s')} on average, with "
            f"longitudinal and transverse temperatures of {si(doc_sim['longitudinal_temperature'], 'K')} and "
            f"{si(doc_sim['transverse_temperature'], 'K')} about their own mean (Doppler limit "
            f"{si(doc_sim['doppler_limit'], 'K')}). Lost: {100 * lost['left_aperture']:.2f} % outside the "
            f"aperture, {100 * lost['dark_state']:.2f} % to dark states ({100 * doc_sim['depumped_fraction']:.1f} % "
            f"went dark at least once), {100 * lost['turned_back']:.2f} % turned back.", "",
            f"In `velocities.png` every histogram is a share of all {doc_sim['atoms']} atoms the source emitted: "
            f"the green bars (captured) add up to {100 * doc_sim['captured_fraction']:.2f} % in each panel; the "
            f"blue line counts every atom crossing the target plane, also those outside the aperture "
            f"({100 * lost['left_aperture']:.2f} %) and those too fast to be held.", "",
            "![velocities](velocities.png)", ""]


def _summary(out, pb, doc_sim, exported, uploaded) -> Path:
    sc, report, doc_plan, table = pb.scenario, pb.report, pb.plan.to_json(), pb.table()
    up, verified = uploaded.report, uploaded.verified
    exported = exported.report
    lines = [f"# sweepgen demo: {sc.title}", "",
             f"Species `{sc.species.key}`, laser `{report.laser.key}`, generator `{report.generator.key}`.",
             "", "## The sweep (`plan.json`)", "", "| quantity | value |", "|---|---|"]
    rows = [("start velocity", si(doc_plan["start_velocity"], "m/s")),
            ("end velocity", si(doc_plan["end_velocity"], "m/s")),
            ("force fraction η", f"{doc_plan['force_fraction']:g}"),
            ("design deceleration", si(doc_plan["deceleration_max"], "m/s²")),
            ("start / end detuning", f"{si(doc_plan['start_detuning'], 'Hz')} / {si(doc_plan['end_detuning'], 'Hz')}"),
            ("chirp span, largest rate", f"{si(doc_plan['chirp_span'], 'Hz')}, {si(doc_plan['chirp_rate_max'], 'Hz/s')}"),
            ("chirp duration", si(doc_plan["chirp_duration"], "s")),
            ("slowing distance", si(doc_plan["slowing_distance"], "m")),
            ("chirp start / arrival after trigger",
             f"{si(doc_plan['start_time'], 's')} / {si(doc_plan['arrival_time'], 's')}"),
            ("photons per atom", f"{doc_plan['photons_per_atom']:.4g}"),
            ("largest scattering rate, saturation the atoms see",
             f"Γ × {doc_plan['max_rate_fraction']:.3g}, s = {doc_plan['effective_saturation']:.3g}"),
            ("atomic beam finding the design force all along the path", f"{100 * doc_plan['beam_overlap']:.1f} %"),
            ("band expected to stay bright (depumping, dark states)", f"{100 * doc_plan['survival_fraction']:.1f} %"),
            ("velocity the hold / the return take after the chirp",
             f"{si(doc_plan['hold_velocity_loss'], 'm/s')} / {si(doc_plan['return_velocity_loss'], 'm/s')}")]
    lines += [f"| {a} | {b} |" for a, b in rows]
    lines += ["", "![sweep](sweep.png)", "", "## The check (`check.json`)", "",
              f"{'No rule fails' if report.ok else 'Some rules FAIL'}: "
              f"{len(report.failures())} failed, {len(report.warnings())} warning(s).", "",
              "| status | rule | value | limit | headroom |", "|---|---|---|---|---|"]
    for f in report.ordered():
        headroom = "" if f.headroom is None else f"{100 * f.headroom:.0f} %"
        value = "" if f.value is None else si(f.value, f.unit)
        limit = "" if f.limit is None else si(f.limit, f.unit)
        lines.append(f"| {f.status} | {f.rule} | {value} | {limit} | {headroom} |")
    lines += ["", "![drive](drive.png)", "", "![headroom](headroom.png)", ""]
    lines += _atoms_section(sc, doc_sim)
    lines += ["## The table and the upload", "",
              f"- `{Path(exported['paths'][0]).relative_to(out)}`: {table.info.count} samples at "
              f"{si(table.info.sample_rate, 'Sa/s')}, sidecar `{Path(exported['paths'][1]).relative_to(out)}`.",
              f"  SHA-256 of the file (what `sha256sum` prints, the sidecar's `sha256`): `{exported['sha256']}`.",
              f"- Uploaded to the virtual instrument over a loopback socket: {up.get('bytes', 0)} bytes, "
              f"verification {'passed' if verified else 'FAILED'} (`upload.json`). The output was left off.",
              f"  SHA-256 of the codes sent (`table_sha256` in `upload.json` and in the sidecar, the same "
              f"whatever the file format): `{up.get('table_sha256')}`.",
              "", "Before connecting a real laser: look at the generator output on an oscilloscope and at the "
              "laser frequency on a wavemeter, and follow your laboratory's laser-safety rules.", ""]
    return atomic_write_text(out / "summary.md", "\n".join(lines))
