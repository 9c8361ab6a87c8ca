"""Average the float weights of several checkpoints of one run into a new run folder.

    python scripts/average_checkpoints.py runs/avg runs/snaps/A runs/snaps/B ...

Checkpoints taken late in a run, while the learning rate is low, sit around one minimum;
their mean usually sits nearer its centre than any one of them (weight averaging). The new
folder holds the mean weights and the last checkpoint's record, with the averaged steps
noted in its history; export it with scripts/export_model.py, which measures it.
"""

import json
from pathlib import Path

import typer
from safetensors.torch import load_file, save_file

from rowcast.train import evaluate, load_checkpoint, load_pools, saved_config, validation_tiles


def main(out: Path, runs: list[Path]) -> None:
    """Write OUT from the mean of the checkpoints in RUNS; print their validation figures."""
    weights = [load_file(str(run / "checkpoint.safetensors")) for run in runs]
    mean = {k: sum(w[k] for w in weights) / len(weights) for k in weights[0]}
    meta = json.loads((runs[-1] / "checkpoint.json").read_text())
    steps = [json.loads((run / "checkpoint.json").read_text())["state"]["history"][-1]["steps"]
             for run in runs]
    meta["state"]["history"].append({**meta["state"]["history"][-1], "averaged_steps": steps})
    meta["state"]["commands"].append(
        "python scripts/average_checkpoints.py " + " ".join(map(str, [out, *runs])))
    out.mkdir(parents=True, exist_ok=True)
    save_file(mean, str(out / "checkpoint.safetensors"))
    (out / "checkpoint.json").write_text(json.dumps(meta, indent=2))
    cfg = saved_config(meta)
    tiles = validation_tiles(cfg, load_pools(cfg)[2])
    for run in [*runs, out]:
        model, _ = load_checkpoint(run)
        print(f"{run}: validation quantised {evaluate(model, tiles, True):.4f} bits per subpixel")


if __name__ == "__main__":
    typer.run(main)
