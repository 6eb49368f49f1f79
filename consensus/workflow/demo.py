"""The demo: the bundled sample company's whole monthly cycle, end to end, in a fresh SQLite store."""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from consensus import periods
from consensus.errors import InputRejected
from consensus.intake.submission import load_actuals_file, load_master_file, submit_file
from consensus.resources import sample_inputs_dir
from consensus.store.db import get_engine, session_scope
from consensus.store.models import Setting
from consensus.workflow.past_cycles import open_past_cycles
from consensus.workflow.cycles import open_cycle
from consensus.workflow.decisions import record_decision
from consensus.workflow.meeting_pack import write_pack
from consensus.workflow.publish import export_components, export_consensus, publish_cycle
from consensus.vocabulary import describe_change
from consensus.workflow.run import run_cycle


@dataclass
class DemoResult:
    log: list[str] = field(default_factory=list)
    outputs: dict[str, Path] = field(default_factory=dict)


def run_demo(workdir: Path | str, *, inputs: Path | None = None,
             progress: Callable[[str], None] | None = None) -> DemoResult:
    """Load the sample inputs into ``workdir/consensus.db`` and run intake, consensus, publish, pack and export."""
    workdir = Path(workdir).resolve()
    workdir.mkdir(parents=True, exist_ok=True)
    inputs = Path(inputs) if inputs else sample_inputs_dir()
    manifest = json.loads((inputs / "manifest.json").read_text(encoding="utf-8"))
    db_file = workdir / "consensus.db"
    if db_file.exists():
        db_file.unlink()
    url = f"sqlite:///{db_file}"
    get_engine.cache_clear()
    result = DemoResult()
    say = result.log.append
    tell = progress or (lambda _m: None)
    with session_scope(url) as session:
        session.add(Setting(key="company", value=manifest["company"]))
    current, horizon = manifest["current_cycle"], int(manifest.get("horizon", 18))
    first_files = [e for e in manifest["files"] if e["kind"] in ("items", "locations", "bom", "actuals")]
    for entry in first_files:  # master data and order history first: a cycle is opened on known orders
        tell(f"intake {entry['path']}")
        kind, by, path = entry["kind"], entry.get("submitted_by", ""), inputs / entry["path"]
        if kind == "actuals":
            outcome = load_actuals_file(path, url=url, submitted_by=by)
        else:
            outcome = load_master_file(path, kind=kind, url=url, submitted_by=by)
        say(outcome.line())
    for name in [*manifest["past_cycles"], current]:
        open_cycle(name, horizon=horizon, url=url, due=manifest.get("due", {}).get(name))
    for entry in manifest["files"]:
        if entry in first_files:
            continue
        path = inputs / entry["path"]
        tell(f"intake {entry['path']}")
        by = entry.get("submitted_by", "")
        try:
            outcome = submit_file(path, url=url, source=entry.get("source"), cycle=entry.get("cycle"),
                                  submitted_by=by)
        except InputRejected as error:
            if entry.get("expect") != "rejected":
                raise
            # the sample company's broken file shows what a rejection looks like, and that nothing changes
            say(error.summary(limit=6))
            say(f"  (kept as rejected submission #{error.submission_id}; nothing else changed)")
            continue
        say(outcome.line())
    first_past = manifest["past_cycles"][0]
    open_past_cycles(periods.shift_month(first_past, -12), periods.shift_month(first_past, -1), horizon=horizon,
                     url=url)
    say(f"the 12 cycles before {first_past} opened for their statistical forecast, so accuracy is measured "
        "from the first cycle")
    publisher = manifest.get("publisher", "")
    for name in manifest["past_cycles"]:
        tell(f"consensus {name}")
        run_cycle(name, url=url)
        publish_cycle(name, url=url, by=publisher)
    say(f"past cycles {manifest['past_cycles'][0]} … {manifest['past_cycles'][-1]}: consensus computed and published")
    tell(f"consensus {current}")
    summary = run_cycle(current, url=url, progress=tell)
    say(summary.line())
    for decision in manifest.get("decisions", []):
        record_decision(current, url=url, **decision)
        say(f"decision: {decision.get('family') or decision.get('item')} {decision['period']} "
            f"{describe_change(decision['kind'], decision['amount'])} by {decision['author']}")
    if manifest.get("decisions"):
        summary = run_cycle(current, url=url, progress=tell)
        say("after the meeting's decisions: " + summary.line())
    run = publish_cycle(current, url=url, by=publisher)
    say(f"cycle {current} published (run #{run.id})")
    tell("pack")
    pdf, pages = write_pack(current, pdf_path=workdir / "pack.pdf", html_path=workdir / "pack.html", url=url)
    say(f"pack: {pages} pages")
    csv_path, state, rows = export_consensus(current, workdir / "consensus.csv", url=url)
    say(f"export: {rows:,} rows ({state})")
    comp_path, comp_rows = export_components(current, workdir / "components.csv", url=url)
    result.outputs = {"store": db_file, "pack (PDF)": pdf, "pack (HTML)": workdir / "pack.html",
                      "consensus": csv_path, "components": comp_path}
    return result


