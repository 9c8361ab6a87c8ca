"""16-bit values as a coarse predictor plane and a range-coded fine part (rowcast.deep)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rowcast import deep


def round_trip(values: np.ndarray) -> np.ndarray:
    params, planes, code = deep.split(values)
    return deep.join(params, planes, code, values.shape)


def values_in(low: int, high: int, shape=(1, 12, 17), seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).integers(low, high + 1, shape).astype(np.uint16)


@pytest.mark.parametrize(("low", "high"), [
    (0, 1), (0, 255), (0, 256), (0, 4095), (1000, 5095), (60000, 65535), (0, 65535)])
def test_random_values_of_every_range_come_back_exactly(low, high):
    values = values_in(low, high)
    assert np.array_equal(round_trip(values), values)


def test_values_their_neighbours_predict_cost_far_less_than_their_fine_bits_literal():
    y = np.arange(96)[:, None]
    values = np.repeat(1000 + 41 * y + y * y % 5, 128, axis=1)[None].astype(np.uint16)
    # each row one value: the left pixel tells it
    params, planes, code = deep.split(values)
    k = params[3] & 15
    assert k == 4  # 12 bits, 8 for the predictor
    assert len(code) < k * values.size / 8 / 3
    assert np.array_equal(deep.join(params, planes, code, values.shape), values)


def test_rgb_groups_share_one_mapping_and_come_back():
    values = values_in(300, 9000, (3, 9, 11), seed=3)
    params, planes, code = deep.split(values)
    assert len(planes) == 1 and planes[0].shape == (3, 9, 11)
    assert np.array_equal(deep.join(params, planes, code, values.shape), values)


@pytest.mark.parametrize("value", [0, 1, 4097, 65535])
def test_a_constant_image_is_one_zero_plane_and_no_fine_code(value):
    values = np.full((1, 5, 6), value, np.uint16)
    params, planes, code = deep.split(values)
    assert code is None and not planes[0].any()
    assert np.array_equal(deep.join(params, planes, code, values.shape), values)


def test_one_pixel_comes_back():
    values = np.array([[[40000]]], np.uint16)
    assert np.array_equal(round_trip(values), values)


def test_a_common_power_of_two_is_divided_out():
    values = (values_in(0, 255, seed=5).astype(np.int64) * 16 + 7).astype(np.uint16)
    params, planes, code = deep.split(values)
    assert params[3] == 4 << 4  # shift 4, no fine bits: 8 bits left
    assert code is None
    assert np.array_equal(deep.join(params, planes, code, values.shape), values)


def test_one_more_fine_bit_comes_back_too():
    values = values_in(100, 2100, seed=2)
    params, planes, code = deep.split(values, extra=1)
    assert params[3] & 15 == 4
    assert np.array_equal(deep.join(params, planes, code, values.shape), values)


def test_an_empty_fine_code_reads_as_none():
    values = np.zeros((1, 3, 3), np.uint16)
    values[0, 0, 0] = 511  # range 9 bits: one fine bit, all but one of them zero
    params, planes, code = deep.split(values)
    trimmed = None if code is None or not code.any() else code
    assert np.array_equal(deep.join(params, planes, trimmed, values.shape), values)


@pytest.mark.parametrize("params", [
    b"", b"\x01\x00\x00", b"\x02\x00\x00\x04", b"\x01\x00\x00\x09", b"\x01\x00\x00\x04\x00"])
def test_malformed_parameters_are_refused(params):
    planes = [np.zeros((1, 2, 2), np.uint8)]
    with pytest.raises(ValueError):
        deep.join(params, planes, None, (1, 2, 2))


def test_parameters_that_overflow_16_bits_are_refused():
    planes = [np.full((1, 2, 2), 255, np.uint8)]
    with pytest.raises(ValueError, match="above 65535"):
        deep.join(b"\x01\xff\x01\x00", planes, None, (1, 2, 2))


def test_a_coarse_plane_of_the_wrong_shape_is_refused():
    params, planes, code = deep.split(values_in(0, 999))
    with pytest.raises(ValueError):
        deep.join(params, [planes[0][:, :-1]], code, (1, 12, 17))


def test_values_outside_16_bits_are_refused():
    with pytest.raises(ValueError, match="outside"):
        deep.split(np.array([[[70000]]], np.int64))


@settings(max_examples=25, deadline=None)
@given(st.integers(1, 3), st.integers(1, 9), st.integers(1, 9), st.integers(0, 65535),
       st.integers(0, 16), st.integers(0, 2**32 - 1))
def test_any_values_come_back(planes, height, width, low, bits, seed):
    span = min(65535 - low, (1 << bits) - 1)
    values = values_in(low, low + span, (planes, height, width), seed)
    assert np.array_equal(round_trip(values), values)
