"""``aftershift demo``: the whole job on invented data, in one command.

Scenario (invented): a lab pilots the default protocol
(``protocols/offset_by_lag.toml``) with three simulated observers drawn
around ``protocols/observers/typical.toml``.  The demo simulates their
sessions through the real session loop, fits them, compares the measured
after-effects with the predictions of a channel-population model
(:mod:`fitting.population`) and writes a one-page HTML report.

Everything is seeded: tables are identical from run to run.  The output
folder is replaced only if it holds a previous demo (marked by the file
``DEMO_MARK``); any other non-empty folder is refused.
"""

from __future__ import annotations

import html
import json
import shutil
from pathlib import Path

import pandas as pd

from fitting.errors import InputError

ROOT = Path(__file__).resolve().parent.parent
PROTOCOL = ROOT / "protocols" / "offset_by_lag.toml"
MODEL = ROOT / "protocols" / "observers" / "typical.toml"
DEMO_MARK = "DEMO_OUTPUT"
SEED = 2026
N_OBSERVERS = 3
N_BOOT = 1000


def _prepare(out: Path) -> None:
    if out.exists() and any(out.iterdir()):
        if not (out / DEMO_MARK).exists():
            raise InputError(str(out), "--out", "is not empty and holds no earlier demo output; choose another folder")
        shutil.rmtree(out)
    out.mkdir(parents=True, exist_ok=True)
    (out / DEMO_MARK).write_text(
        "This folder is the output of `aftershift demo`; running the demo again replaces it.\n", encoding="utf-8"
    )


def run_demo(out_dir: str | Path = "results_demo", progress: bool | None = None) -> Path:
    """Simulate, fit, compare and report; return the report's path.

    Parameters
    ----------
    out_dir : str or Path
        Output folder (default ``results_demo``).
    progress : bool or None
        Progress bars (None: only on a terminal).
    """
    from fitting.compare import compare_results
    from fitting.population import ChannelModel, predict_table
    from fitting.report import fit_logs
    from fitting.tables import write_text
    from runner.launch import simulate
    from runner.observers import load_model
    from runner.protocol import load_protocol, read_protocol_text
    from runner.safety import screen_protocol

    out = Path(out_dir)
    _prepare(out)
    protocol = load_protocol(PROTOCOL)
    text = read_protocol_text(PROTOCOL)
    screening = screen_protocol(protocol)
    rel_protocol = str(PROTOCOL.relative_to(ROOT))
    simulate(
        protocol, rel_protocol, text, out / "logs", load_model(MODEL), N_OBSERVERS, SEED,
        screening=screening.to_dict(), progress=progress,
    )
    for lock in (out / "logs").glob("*.lock"):  # no session writes the demo's logs any more
        lock.unlink()
    report = fit_logs([str(out / "logs")], str(out / "fit"), n_boot=N_BOOT, seed=SEED, progress=progress)
    predictions = predict_table(
        ChannelModel(tuning_kappa=4.0, adapt_strength=0.25, adapt_kappa=6.0, recovery_periods=2.0),
        protocol.design.adapter_offsets_deg, protocol.design.lags,
    )
    predictions.to_csv(out / "predictions_population_model.csv", index=False, float_format="%.6f")
    comparison = compare_results(out / "fit", out / "predictions_population_model.csv", out / "compare")
    page = out / "report.html"
    write_text(page, _report_html(out, protocol, screening, report, comparison))
    return page


def _table_html(frame: pd.DataFrame, digits: int = 2) -> str:
    return frame.to_html(index=False, float_format=lambda v: f"{v:.{digits}f}", border=0, classes="t")


def _timing_rows(out: Path) -> pd.DataFrame:
    rows = []
    for p in sorted((out / "logs").glob("*.session.json")):
        side = json.loads(p.read_text(encoding="utf-8"))
        part = side["parts"][-1]
        rows.append({
            "observer": side["observer"],
            "trials": side.get("rows_total"),
            "presenter": part.get("timing", {}).get("presenter"),
            "dropped frames": part.get("timing", {}).get("dropped_frames"),
            "ended": part.get("ended_by"),
        })
    return pd.DataFrame(rows)


def _report_html(out: Path, protocol, screening, report, comparison) -> str:
    tuning = pd.read_csv(out / "fit" / "tuning.csv")
    decay = pd.read_csv(out / "fit" / "decay.csv")
    agreement = comparison.table[comparison.table["lag"] == "all"]
    figures = sorted(p.relative_to(out).as_posix() for p in (out / "fit").rglob("*.png"))
    wanted = [f for f in figures if any(k in f for k in ("aftereffect", "decay"))] or figures[:4]
    imgs = "\n".join(f'<figure><img src="{html.escape(f)}" alt="{html.escape(f)}"><figcaption>{html.escape(f)}</figcaption></figure>' for f in wanted)
    safety_lines = "\n".join(html.escape(line) for line in screening.summary_lines())
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>aftershift demo report</title>
<style>
body {{ font-family: sans-serif; max-width: 60em; margin: 2em auto; color: #222; line-height: 1.4; }}
h1 {{ font-size: 1.5em; }} h2 {{ font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }}
table.t {{ border-collapse: collapse; font-size: 0.85em; }} table.t td, table.t th {{ padding: 2px 8px; text-align: right; }}
table.t tr:nth-child(even) {{ background: #f4f4f4; }}
figure {{ display: inline-block; margin: 0.5em; }} img {{ max-width: 28em; }} figcaption {{ font-size: 0.75em; color: #666; }}
pre {{ background: #f7f7f7; padding: 0.6em; font-size: 0.8em; white-space: pre-wrap; }}
</style></head><body>
<h1>aftershift demo: {html.escape(protocol.title)}</h1>
<p>Invented scenario: three simulated observers (<code>protocols/observers/typical.toml</code>, seed {SEED})
ran <code>protocols/offset_by_lag.toml</code> through the session loop without a display. Their logs were fitted
with {N_BOOT} parametric bootstrap replicates per observer and compared with a channel-population model.
Nothing here is data from people.</p>
<h2>After-effect tuning per lag (DoG fits, 95 % CIs)</h2>
{_table_html(tuning)}
<h2>Decay over lags</h2>
{_table_html(decay)}
<h2>Figures</h2>
{imgs}
<h2>Agreement with the channel-population predictions (all lags)</h2>
{_table_html(agreement)}
<figure><img src="compare/comparison.png" alt="measured and predicted after-effects" style="max-width: 58em">
<figcaption>compare/comparison.png: measured (points, 95 % CIs) and predicted (lines)</figcaption></figure>
<h2>Timing</h2>
{_table_html(_timing_rows(out), 0)}
<p>Simulated sessions run on a virtual clock, so no frame can drop; sessions on a display record every flip.</p>
<h2>Photosensitivity screening</h2>
<pre>{safety_lines}</pre>
<h2>Fit summary</h2>
<pre>{html.escape(report.summary())}</pre>
</body></html>
"""
