"""Export a training run's checkpoint as an integer model file.

    python scripts/export_model.py runs/default src/rowcast/models/default.safetensors
"""

import json
from pathlib import Path

import typer

from rowcast.train import export_checkpoint


def main(run: Path, dest: Path, name: str = "default") -> None:
    """Write DEST from the checkpoint in RUN and print the validation figures."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    print(json.dumps(export_checkpoint(run, dest, name), indent=2))


if __name__ == "__main__":
    typer.run(main)
