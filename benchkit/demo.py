"""The main job end to end on the embedded simulated bench: `make demo`.

Sweep the demo fixture -> points.csv -> fit -> plots -> curve library -> query -> SPICE
export, then sweep the incoming lot and verify it against the invented supplier claims, then
put the X7R parts in the climate chamber: measure them at four temperatures, answer the
12 V / 85 degC question from the library, check each against its class code (one of them,
BD-1009, is mislabelled) and export a C(V, T) model for SPICE.
Every step is the same CLI command an engineer would type; the demo only strings them
together on a virtual clock, so an afternoon of bench time passes in seconds.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

from benchkit.cli import SAFETY_NOTE, main as cli

DATA = Path(__file__).resolve().parents[1] / "data"


def _step(title: str, argv: list[str], ok_codes: tuple[int, ...] = (0,)) -> int:
    if title:
        print(f"\n== {title}")
    print(f"$ benchkit {' '.join(argv)}", flush=True)
    code = cli(argv)
    if code not in ok_codes:
        raise SystemExit(f"demo: step '{title}' ended with exit code {code}")
    return code


def run_demo(out: Path, quiet_sweeps: bool = True) -> dict[str, Path]:
    """Run every step into `out` (replaced if it exists) and return the outputs by name."""
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    plan = str(DATA / "plans" / "demo.toml")
    o = {
        "fixture_run": out / "run-fixture",
        "curves": out / "curves",
        "plots": out / "plots",
        "library": out / "library.sqlite",
        "exports": out / "exports",
        "lot_run": out / "run-lot",
        "verify_pass": out / "verify-typical",
        "verify_fail": out / "verify-optimistic",
        "temperature_run": out / "run-temperature",
        "class_check": out / "class-check.json",
        "families": out / "families",
    }
    lib = ["--library", str(o["library"])]
    _step("sweep the demo fixture on the simulated bench (virtual clock)",
          ["measure", "--sim", "--virtual-clock", "--plan", plan, "--out", str(o["fixture_run"])])
    _step("fit a C(V) model to every sample and branch",
          ["fit", str(o["fixture_run"]), "--model", "auto", "--out", str(o["curves"]),
           "--plot", str(o["plots"] / "fit.png")])
    _step("file the parts and the run in the in-house library",
          ["library", *lib, "add-parts", str(DATA / "parts.toml")])
    _step("", ["library", *lib, "add", str(o["fixture_run"]), "--all-parts"])
    _step("", ["library", *lib, "add", str(DATA / "claims" / "BD-1004-typical.csv")])
    _step("which parts keep the most capacitance at 5 V?",
          ["library", *lib, "query", "--bias", "5"])
    _step("export BD-1001 as a SPICE subcircuit and a table",
          ["library", *lib, "export", "BD-1001", "--format", "spice", "--out", str(o["exports"])])
    _step("", ["library", *lib, "export", "BD-1001", "--format", "csv", "--out", str(o["exports"])])
    _step("sweep the incoming lot",
          ["measure", "--sim", "--lot", "--virtual-clock", "--plan", plan, "--out", str(o["lot_run"])])
    _step("verify the lot against the supplier's typical claim (guarded acceptance)",
          ["verify", "--claim", str(DATA / "claims" / "BD-1004-typical.csv"), str(o["lot_run"]),
           "--rule", "guarded", "--out", str(o["verify_pass"])], ok_codes=(0, 1, 3))
    _step("verify the lot against an optimistic claim",
          ["verify", "--claim", str(DATA / "claims" / "BD-1004-optimistic.csv"), str(o["lot_run"]),
           "--rule", "guarded", "--out", str(o["verify_fail"])], ok_codes=(0, 1, 3))
    _step("sweep the X7R parts in the climate chamber at -55, 25, 85 and 125 degC (virtual clock)",
          ["measure", "--sim", "--fixture", str(DATA / "fixture-temperature.toml"), "--virtual-clock",
           "--plan", str(DATA / "plans" / "temperature.toml"), "--out", str(o["temperature_run"])])
    _step("", ["library", *lib, "add", str(o["temperature_run"]), "--all-parts"])
    _step("effective capacitance of every X7R part at 12 V and 85 degC",
          ["library", *lib, "query", "--bias", "12", "--temp", "85", "--class", "X7R"])
    _step("does each part keep its class code over temperature? (BD-1009 should not)",
          ["class-check", str(o["temperature_run"]), "--out", str(o["class_check"]),
           "--families", str(o["families"])], ok_codes=(0, 1, 3))
    _step("export BD-1004 over bias and temperature as one SPICE subcircuit",
          ["export", str(o["families"] / "BD-1004-FT-04-rising.family.json"), "--format", "spice",
           "--out", str(o["exports"] / "BD-1004-temperature.lib")])
    return o


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchkit.demo", description=__doc__)
    parser.add_argument("--out", default="out/demo", help="output folder (replaced)")
    args = parser.parse_args(argv)
    print(SAFETY_NOTE)
    outputs = run_demo(Path(args.out))
    print("\n== outputs")
    for name, path in outputs.items():
        print(f"  {name:12s} {path}")
    print()
    safe = True
    for key in ("fixture_run", "lot_run", "temperature_run"):
        meta = json.loads((outputs[key] / "run.json").read_text(encoding="utf-8"))
        state = meta.get("sim_final_supply_state") or {}
        ok = state.get("set_V") == 0.0 and state.get("output_on") is False
        safe &= ok
        print(f"{key}: {meta['status']}; bias supply at the end: "
              f"{state.get('set_V')} V set, output {'on' if state.get('output_on') else 'off'}"
              + ("" if ok else "  <-- NOT SAFE: check the fixture"))
        if "chamber_final" in meta:
            ch = meta["chamber_final"]
            safe &= bool(ch.get("confirmed"))
            print(f"{key}: chamber sent to {ch.get('setpoint_C')} degC"
                  + ("" if ch.get("confirmed") else "  <-- NOT CONFIRMED: check the chamber"))
    return 0 if safe else 1


if __name__ == "__main__":
    sys.exit(main())
