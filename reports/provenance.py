"""The provenance part of the dossier: data fingerprints, exact specifications, software versions and the
audit trail (who did what, then the most recent events)."""

from __future__ import annotations

import json
import math
import re
from collections import Counter
from collections.abc import Sequence
from typing import Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.inputs import DossierInput, RunInfo

AUDIT_RECENT = 25

_SHA = re.compile(r"[0-9a-f]{64}")


def provenance_markdown(inp: DossierInput) -> str:
    """The provenance section, or empty text when there are neither runs nor audit events."""
    out = []
    runs = sorted(inp.runs, key=lambda r: (r.created_text, r.slug))
    if runs:
        rows = [
            [
                mt.cell(r.slug),
                mt.cell(r.created_text),
                mt.cell(r.dataset_path),
                f"`{r.dataset_sha256}`" if _SHA.fullmatch(r.dataset_sha256) else mt.cell(r.dataset_sha256),
                rv.fmt(r.seconds, 3) if r.seconds is not None else "–",
            ]
            for r in runs
        ]
        out.append(
            "### Data and runs\n\n" + mt.table(["Run", "Created", "Dataset", "SHA-256", "Seconds"], rows)
        )
        specs = _spec_tables(runs)
        if specs:
            out.append("### Exact specifications\n\n" + specs)
        versions: dict[str, set[str]] = {}
        for r in runs:
            for pkg, ver in r.package_versions.items():
                versions.setdefault(str(pkg), set()).add(str(ver))
        if versions:
            rows = [[mt.cell(pkg), mt.cell(", ".join(sorted(v)))] for pkg, v in sorted(versions.items())]
            out.append("### Software\n\n" + mt.table(["Package", "Version(s) across runs"], rows))
    if inp.audit:
        out.append(_audit(inp))
    if not out:
        return ""
    return "## Provenance\n\n" + "\n\n".join(out)


def _spec_value(value: Any) -> str:
    if value is None:
        return "(none)"
    if isinstance(value, str):
        return value
    if isinstance(value, Sequence):
        return ", ".join(_spec_value(v) for v in value) or "(none)"
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    try:
        return json.dumps(value, sort_keys=True, default=str)
    except (TypeError, ValueError):
        return str(value)


MAX_DIFFERING_OPTIONS = 6


def _spec_tables(runs: Sequence[RunInfo]) -> str:
    """Options every run shares in one table; options that differ in a second table with one row per run."""
    with_spec = [r for r in runs if r.spec]
    if not with_spec:
        return ""
    keys: list[str] = []
    for run in with_spec:
        keys.extend(str(k) for k in run.spec if str(k) not in keys)
    values = {k: [_spec_value(r.spec.get(k)) if k in r.spec else "–" for r in with_spec] for k in keys}
    shared = [k for k in keys if len(set(values[k])) == 1]
    differing = [k for k in keys if k not in shared]
    if len(differing) > MAX_DIFFERING_OPTIONS:
        blocks = []
        for run in with_spec:
            rows = [[mt.cell(k), mt.cell(_spec_value(v))] for k, v in run.spec.items()]
            blocks.append(f"Run **{mt.inline(run.slug)}**:\n\n" + mt.table(["Option", "Value"], rows))
        return "\n\n".join(blocks)
    parts = []
    if shared:
        label = (
            "Options shared by every run:"
            if len(with_spec) > 1
            else f"Run **{mt.inline(with_spec[0].slug)}**:"
        )
        rows = [[mt.cell(k), mt.cell(values[k][0])] for k in shared]
        parts.append(label + "\n\n" + mt.table(["Option", "Value"], rows))
    if differing:
        rows = [
            [mt.cell(r.slug), *[mt.cell(values[k][i]) for k in differing]] for i, r in enumerate(with_spec)
        ]
        parts.append(
            "Options that differ between runs:\n\n"
            + mt.table(["Run", *[mt.cell(k) for k in differing]], rows)
        )
    return "\n\n".join(parts)


def _audit(inp: DossierInput) -> str:
    events = sorted(inp.audit, key=lambda e: (e.when_text, e.actor, e.action))
    by_actor: dict[str, Counter[str]] = {}
    first: dict[str, str] = {}
    last: dict[str, str] = {}
    for e in events:
        by_actor.setdefault(e.actor, Counter())[e.action] += 1
        first.setdefault(e.actor, e.when_text)
        last[e.actor] = e.when_text
    rows = [
        [
            mt.cell(actor),
            mt.cell(", ".join(f"{action} ×{n}" for action, n in sorted(counts.items()))),
            mt.cell(first[actor]),
            mt.cell(last[actor]),
        ]
        for actor, counts in sorted(by_actor.items())
    ]
    text = "### Who did what\n\n" + mt.table(["Who", "Actions", "First", "Last"], rows)
    recent = events[-AUDIT_RECENT:]
    heading = (
        "All events"
        if len(recent) == len(events)
        else f"The {len(recent)} most recent of {len(events)} events"
    )
    rows = [
        [mt.cell(e.when_text), mt.cell(e.actor), mt.cell(e.action), mt.cell(e.entity), mt.cell(e.summary)]
        for e in reversed(recent)
    ]
    return text + f"\n\n{heading}:\n\n" + mt.table(["When", "Who", "Action", "Entity", "Summary"], rows)
