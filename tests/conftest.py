"""Shared fixtures: the committed tiny model, the bundled model, held-out thumbnails."""

from pathlib import Path

import numpy as np
import pytest

from rowcast.heldout import GRAY_PHOTOS, RGB_PHOTOS, thumbnails
from rowcast.predictor import Engine
from rowcast.quantize import load_model

GOLDEN = Path(__file__).parent / "golden"
TINY = GOLDEN / "tiny.safetensors"


@pytest.fixture(scope="session")
def tiny_engine() -> Engine:
    """A 2-layer model committed with the golden archive: fast enough for edge cases."""
    return Engine(load_model(TINY))


@pytest.fixture(scope="session")
def default_engine() -> Engine:
    """The bundled default model, as users get it."""
    return Engine(load_model())


@pytest.fixture(scope="session")
def rgb64() -> list[np.ndarray]:
    """64-px RGB thumbnails of the photographs in scikit-image's wheel (held out of training)."""
    return [p for _, p in thumbnails(RGB_PHOTOS, "RGB", 64)]


@pytest.fixture(scope="session")
def gray64() -> list[np.ndarray]:
    """64-px gray thumbnails of scikit-image's gray photographs."""
    return [p for _, p in thumbnails(GRAY_PHOTOS, "L", 64)]


def assert_flips_refused(original: bytes, positions, masks: tuple[int, ...], damaged: Path,
                         reader) -> None:
    """Each byte at `positions` of `original`, flipped by each mask and written to
    `damaged`, makes `reader(damaged)` raise ArchiveError with one line naming the file."""
    from rowcast.archive import ArchiveError

    for position in positions:
        for mask in masks:
            data = bytearray(original)
            data[position] ^= mask
            damaged.write_bytes(bytes(data))
            with pytest.raises(ArchiveError) as caught:
                reader(damaged)
            assert caught.value.args[0].startswith(f"{damaged}: ")
            assert "\n" not in caught.value.args[0]
