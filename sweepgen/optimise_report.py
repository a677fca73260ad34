"""The files a search leaves: the best scenario as a new TOML file, a report, its JSON and a plot.

``STEM-best.toml`` is the starting scenario with the winning values (its layout and
comments kept, :mod:`sweepgen._toml_edit`; paths to profiles rewritten so that they
still name the same files from the new folder), ``STEM-optimise.md`` the report
(the improvement with its error, what binds at the optimum, the history plot),
``STEM-optimise.json`` the ``optimise --json`` document and ``STEM-optimise.png``
the history. No file is ever replaced: when one of these names is taken, all
four get the next free number (``STEM-best-2.toml``, ...).
"""

from __future__ import annotations

import os
from pathlib import Path

from sweepgen.errors import InputError

#: the four files, by kind: name after the stem (and number), and extension
KINDS = {"scenario": ("best", ".toml"), "report": ("optimise", ".md"), "json": ("optimise", ".json"),
         "plot": ("optimise", ".png")}
#: profiles a scenario names by built-in key or by path
PROFILE_KEYS = {"species": "species", "laser": "lasers", "generator": "generators"}


def names(folder, stem: str) -> dict:
    """The four paths, numbered so that none of them exists yet."""
    folder = Path(folder)
    for n in range(1, 10_000):
        tag = "" if n == 1 else f"-{n}"
        paths = {k: folder / f"{stem}-{word}{tag}{ext}" for k, (word, ext) in KINDS.items()}
        if not any(p.exists() for p in paths.values()):
            return paths
    raise InputError("ten thousand earlier results are in this folder; choose another", key="--output")


def moved_profiles(start, folder) -> dict:
    """The profile references of the starting scenario that are paths, rewritten relative to
    ``folder`` (built-in keys and absolute paths stay as they are)."""
    from sweepgen import catalog

    out = {}
    base_dir = Path(start.path).parent
    for key, kind in PROFILE_KEYS.items():
        ref = start.data.get(key)
        if not isinstance(ref, str) or Path(ref).is_absolute():
            continue
        path = Path(catalog.resolve(kind, ref, relative_to=base_dir))
        if str(path).startswith(str(catalog.builtin_dir(kind))):
            continue
        out[key] = os.path.relpath(path.resolve(), Path(folder).resolve())
    return out


def scenario_text(result, folder) -> tuple[str, bool]:
    """The best scenario's TOML text, with a comment saying where it came from."""
    from sweepgen import _toml_edit
    from sweepgen.scan import set_keys

    s = result.search
    best = result.best_row or result.best
    values = {**best["values"], **moved_profiles(s.start, folder)}
    wanted = set_keys(s.start.data, values)
    source = Path(s.start.path)
    if source.is_file():
        text, kept = _toml_edit.with_values(source.read_text(encoding="utf-8-sig"), values, wanted)
    else:                           # a scenario given as a dict (the Python API): its table, written whole
        text, kept = _toml_edit.dump(wanted), False
    shown = ", ".join(f"{k} = {v}" for k, v in best["values"].items())
    head = (f"# The best design sweepgen optimise found from {source.name}: {shown}\n"
            f"# (see the report beside this file)\n")
    return head + text, kept


def write(result, folder, stem: str) -> dict:
    """Write the four files into ``folder``; their paths (the scenario only when a design passed)."""
    from sweepgen._atomic import atomic_write_text
    from sweepgen._json import dumps
    from sweepgen.search_plots import plot_history

    paths = names(folder, stem)
    written = {}
    if result.best is not None:
        text, kept = scenario_text(result, folder)
        atomic_write_text(paths["scenario"], text)
        written["scenario"] = paths["scenario"]
        result.extras["layout_kept"] = kept
    if result.search.history:
        written["plot"] = plot_history(result, paths["plot"])
    doc = result.to_json()
    doc["files"] = {k: str(v) for k, v in {**written, "report": paths["report"], "json": paths["json"]}.items()}
    atomic_write_text(paths["json"], dumps(doc))
    atomic_write_text(paths["report"], markdown(result, doc))
    return doc["files"]


def _pct(p, e=None) -> str:
    if p is None:
        return "—"
    return f"{100 * p:.2f} %" + (f" ± {100 * e:.2f} %" if e is not None else "")


def markdown(result, doc) -> str:
    """The report: what was searched, the confirmed improvement, what binds, the history plot."""
    s = result.search
    lines = [f"# Search for the best design: {s.start.title}", "",
             f"- scenario: `{s.start.path}`",
             f"- objective: {'smallest' if s.goal.minimise else 'largest'} `{s.goal.key}`, among designs that "
             f"pass `sweepgen check`",
             *[f"- free: `{f.key}` from {f.low:g} to {f.high:g} {f.unit}".rstrip() for f in s.frees],
             f"- optimiser: {doc['optimiser']}; {doc['evaluations']} designs, {s.atoms} atoms each, seed {s.seed} "
             f"(the same for every design)", ""]
    lines += _confirmation(result) + _binding(result) + _tapered(result.extras.get("tapered_field"))
    if "plot" in doc["files"]:
        lines += ["## History of the search", "", f"![history]({Path(doc['files']['plot']).name})", ""]
    if not result.finished:
        lines += ["The search was interrupted: the best design so far is shown, not confirmed.", ""]
    return "\n".join(lines)


def _confirmation(result) -> list:
    s = result.search
    if result.best is None:
        return ["No design that passes check was found.", ""]
    lines = ["## The best design", "", "| | " + " | ".join(f"`{f.key}`" for f in s.frees) + " | captured | check |",
             "|---|" + "---|" * len(s.frees) + "---|---|"]
    for name, row in (("start", result.start_row), ("best", result.best_row)):
        if row is None:
            continue
        values = [str(row["values"].get(f.key, _start_value(f))) for f in s.frees]
        verdict = row["verdict"] + (f" ({', '.join(row['failing_rules'])})" if row["failing_rules"] else "")
        lines.append(f"| {name} | " + " | ".join(values) + f" | {_pct(row['captured_fraction'], row['captured_error'])} "
                     f"| {verdict} |")
    imp = result.improvement()
    if imp is not None:
        lines += ["", f"Confirmed with {result.confirm_atoms} atoms and a fresh seed ({result.confirm_seed}): "
                      f"the captured fraction changes by {_pct(imp['difference'], imp['error'])} (1σ), "
                      + ("beyond two standard errors." if imp["significant"] else "within two standard errors: "
                         "not a measurable improvement.")]
    return lines + [""]


def _start_value(free) -> str:
    from sweepgen.scan import written

    return "—" if free.start is None else str(written(free.start, free.unit))


def _binding(result) -> list:
    from sweepgen.checker import WARN_HEADROOM

    rows = result.binding()
    lines = ["## What binds at the optimum", ""]
    if not rows:
        lines.append(f"No rule is within {100 * WARN_HEADROOM:.0f} % of its limit (where check warns) and no "
                     f"free key at a bound.")
    for b in rows:
        if "rule" in b:
            lines.append(f"- rule `{b['rule']}`: headroom {100 * b['headroom']:.1f} %")
        else:
            lines.append(f"- `{b['free']}` at its {b['bound']} bound ({b['value']:g} {b['unit']})".rstrip())
    near = ", ".join(f"`{b['rule']}` {100 * b['headroom']:.1f} %" for b in result.nearest())
    return lines + ["", f"Rules nearest their limits (headroom): {near}.", ""]


def _tapered(doc) -> list:
    """The winner's chirp beside a tapered-field slower of the same deceleration and light."""
    if doc is None:
        return []
    lines = ["## The tapered-field alternative", ""]
    if "unavailable" in doc:
        return lines + [f"Not worked out: {doc['unavailable']}", ""]
    f = doc["field"]
    lines += [f"The winner's atoms ({doc['atoms']}, seed {doc['seed']}) through a tapered-field (Zeeman) slower "
              f"with the same deceleration ({f['deceleration']:.4g} m/s²) and light, the light held at "
              f"{f['laser_detuning'] / 1e6:.6g} MHz: B(z) = B₀·√(1 − z/L₀) + B_bias (Foot, Atomic Physics, "
              f"2005, §9.3, eqs. 9.11–9.12), B₀ = {1e3 * f['b0']:.4g} mT, L₀ = {f['l0']:.4g} m, "
              f"B_bias = {1e3 * f['bias']:.4g} mT, peak |B| = {1e3 * f['peak_field']:.4g} mT, "
              f"{f['length']:.4g} m long from {f['start_position']:.4g} m.", "",
              "| method | captured | final velocity (mean) |", "|---|---|---|"]
    for name, key in (("chirp (the winner)", "chirp"), ("tapered field", "field")):
        v = doc[f"{key}_final_velocity_mean"]
        lines.append(f"| {name} | {_pct(doc[f'{key}_captured_fraction'], doc[f'{key}_captured_error'])} | "
                     + ("—" if v is None else f"{v:.3g} m/s") + " |")
    return lines + [""]
