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
from safetensors.torch import save_file

from rowcast.train import evaluate, load_checkpoint, load_pools, saved_config, validation_tiles


def main(out: Path, runs: list[Path]) -> None:
    """Write OUT from the mean of the checkpoints in RUNS; print their validation figures."""
    loaded = [load_checkpoint(run) for run in runs]  # (model, record): each file read once
    weights = [model.state_dict() for model, _ in loaded]
    mean = {k: sum(w[k] for w in weights) / len(weights) for k in weights[0]}
    meta = loaded[-1][1]
    steps = [record["state"]["history"][-1]["steps"] for _, record in loaded]
    meta["state"]["history"].append({**meta["state"]["history"][-1], "averaged_steps": steps})
    meta["state"]["commands"].append(
        "python scripts/average_checkpoints.py " + " ".join(map(str, [out, *runs])))
    out.mkdir(parents=True, exist_ok=True)
    save_file({k: v.contiguous() for k, v in mean.items()}, str(out / "checkpoint.safetensors"))
    (out / "checkpoint.json").write_text(json.dumps(meta, indent=2))
    averaged, _ = load_checkpoint(out)
    cfg = saved_config(meta)
    tiles = validation_tiles(cfg, load_pools(cfg)[2])
    for name, (model, _) in zip([*runs, out], [*loaded, (averaged, meta)], strict=True):
        print(f"{name}: validation quantised {evaluate(model, tiles, True):.4f} bits per subpixel")

if __name__ == "__main__":
    typer.run(main)
