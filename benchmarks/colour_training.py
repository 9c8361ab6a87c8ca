"""Does the network gain from correcting the colour-difference base? Two runs of the same
budget from the bundled default (median base): one on its own base, one switched to the
colour-difference base (`family.difference_base`, `python -m rowcast.train ... --base
difference`), its G and B means and couplings learning to correct that base instead.

    python benchmarks/colour_training.py [--minutes 15] [--lr 2e-4] [--seed 17]

Both runs see the same crops (the same seed) and report the quantised validation figure
of the corpus's validation tiles (`train.VALIDATION`), as the training log prints it, at
the start and at the end. Prints the figures and writes benchmarks/COLOUR_TRAINING.md and
benchmarks/colour_training.json.
"""

from __future__ import annotations

import json
import tempfile
from datetime import date
from pathlib import Path

import typer

import rowcast
from rowcast import family as fam
from rowcast.train import Config, train

HERE = Path(__file__).parent
CORPUS = HERE.parent.parent / "shared" / "corpus"


def run(base: str, minutes: float, lr: float, seed: int, folder: Path) -> dict:
    """One run from the default on `base` ("plain" or "difference"): its logged figures."""
    figures: dict = {"base": base, "lines": [], "checks": []}

    def log(line: str) -> None:
        figures["lines"].append(line)
        print(f"[{base}] {line}", flush=True)
        if line.startswith("resuming "):
            figures["first_step"] = int(line.split(" after ")[1].split()[0])
        elif line.startswith("validation at the start:"):
            figures["start"] = float(line.split(":")[1].split()[0])
        elif line.startswith("{") and "val_quant_bpsp" in line:
            figures["end"] = json.loads(line)
        elif line.startswith("{") and "val_bpsp" in line:
            figures["checks"].append(json.loads(line)["val_bpsp"])

    train(Config(data=str(CORPUS), out=str(folder / base), minutes=minutes, lr=lr,
                 resume="default", sensor_fraction=0.1, seed=seed, base=base), log=log)
    return figures


def main(minutes: float = 15.0, lr: float = 2e-4, seed: int = 17) -> None:
    """Both runs, one after the other; write the report."""
    with tempfile.TemporaryDirectory() as tmp:
        runs = [run(base, minutes, lr, seed, Path(tmp)) for base in fam.MODEL_BASES]
    result = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
              "minutes": minutes, "lr": lr, "seed": seed,
              "runs": [{k: v for k, v in r.items() if k != "lines"} for r in runs]}
    (HERE / "colour_training.json").write_text(json.dumps(result, indent=1) + "\n")
    lines = [f"# Training on the colour-difference base ({result['date']}, rowcast "
             f"{result['rowcast']})", "",
             f"`python benchmarks/colour_training.py --minutes {minutes:g} --lr {lr:g} --seed "
             f"{seed}`: two runs of {minutes:g} minutes on 2 CPU cores from the bundled "
             "default, the same crops, one on its own (median) base and one switched to the "
             "colour-difference base, its G and B means and couplings learning to correct "
             "it (`--base difference`). Quantised validation bits per subpixel on the "
             "corpus's validation tiles, as the training log prints them, at the start, "
             "every 5 minutes and at the end.", "",
             "| base | at the start | every 5 minutes | at the end | steps |",
             "|---|---:|---|---:|---:|"]
    for r in runs:
        end = r.get("end", {})
        lines.append(f"| {r['base']} | {r.get('start', float('nan')):.4f} | "
                     f"{', '.join(f'{v:.4f}' for v in r['checks'])} | "
                     f"{end.get('val_quant_bpsp', float('nan')):.4f} | "
                     f"{end.get('steps', 0) - r.get('first_step', 0)} |")
    (HERE / "COLOUR_TRAINING.md").write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    typer.run(main)
