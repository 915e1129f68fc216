"""Per-row int8 quantisation (packer/quantize.py) against the ONNX operator definitions.

External reference: the ONNX operator specification of `QuantizeLinear` (opset 13+:
y = saturate(round_half_to_even(x / y_scale) + y_zero_point), per-axis scales with `axis`)
and `DequantizeLinear` (y = (x - x_zero_point) * x_scale), executed by
`onnx.reference.ReferenceEvaluator`, the ONNX project's own Python implementation of the spec.
Round-half-to-even is also checked against Python's built-in `round` (stdlib, banker's rounding).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

import danpack.pack.quantize as quantize_module
from danpack.pack.quantize import QMAX, dequantize_rows, quantize_rows

U32 = 2.0 ** -24  # float32 unit roundoff (half of machine epsilon 2**-23), IEEE 754 binary32
TINY32 = float(np.finfo(np.float32).tiny)  # smallest normal float32


def _evaluator(op: str, opset: int) -> ReferenceEvaluator:
    """A one-node ONNX model: per-row (axis=0) QuantizeLinear or DequantizeLinear with int8 zero point 0."""
    if op == "QuantizeLinear":
        inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["V", "D"]),
                  helper.make_tensor_value_info("scale", TensorProto.FLOAT, ["V"]),
                  helper.make_tensor_value_info("zero", TensorProto.INT8, ["V"])]
        out = helper.make_tensor_value_info("y", TensorProto.INT8, ["V", "D"])
    else:
        inputs = [helper.make_tensor_value_info("x", TensorProto.INT8, ["V", "D"]),
                  helper.make_tensor_value_info("scale", TensorProto.FLOAT, ["V"]),
                  helper.make_tensor_value_info("zero", TensorProto.INT8, ["V"])]
        out = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["V", "D"])
    node = helper.make_node(op, ["x", "scale", "zero"], ["y"], axis=0)
    graph = helper.make_graph([node], "per_row", inputs, [out])
    return ReferenceEvaluator(helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)]))


@pytest.fixture(scope="module", params=[13, 19, 21])
def quantize_ref(request):
    return _evaluator("QuantizeLinear", request.param)


@pytest.fixture(scope="module", params=[19, 21, 23])  # onnx.reference implements DequantizeLinear from 19 on
def dequantize_ref(request):
    return _evaluator("DequantizeLinear", request.param)


def _ref_quantize(ev: ReferenceEvaluator, x: np.ndarray, scales: np.ndarray) -> np.ndarray:
    return ev.run(None, {"x": x, "scale": scales, "zero": np.zeros(len(scales), np.int8)})[0]


def _random_table(seed: int = 0, rows: int = 400, width: int = 50) -> np.ndarray:
    """Rows of very different magnitudes (1e-30 .. 1e30), signs and distributions."""
    rng = np.random.default_rng(seed)
    base = rng.standard_normal((rows, width)) * 10.0 ** rng.uniform(-30, 30, size=(rows, 1))
    base[::7] = rng.uniform(-1, 1, size=base[::7].shape)  # uniform rows
    base[1::11, :3] = 0.0  # some exact zeros inside rows
    base[2::13] = np.abs(base[2::13])  # one-signed rows
    return base.astype(np.float32)


# --- agreement with QuantizeLinear -------------------------------------------------------

def test_quantize_matches_quantizelinear_on_random_rows(quantize_ref):
    table = _random_table()
    q, scales = quantize_rows(table)
    assert q.dtype == np.int8 and q.shape == table.shape
    assert scales.dtype == np.float32 and scales.shape == (table.shape[0],)
    # scale = max|row| / 127 in float32 (the module's documented choice, symmetric int8)
    expected_scales = np.abs(table).max(axis=1) / np.float32(QMAX)
    np.testing.assert_array_equal(scales, expected_scales.astype(np.float32))
    np.testing.assert_array_equal(q, _ref_quantize(quantize_ref, table, scales))
    assert q.min() >= -QMAX and q.max() <= QMAX  # -128 never produced
    # the extreme element of each row lands on +-127
    assert (np.abs(q).max(axis=1) == QMAX).all()


@pytest.mark.parametrize("scale", [2.0 ** -7, 0.75, 3.0 * 2.0 ** -10, 1.0, 2.0 ** 20])
def test_ties_at_exactly_half_round_to_even(quantize_ref, scale):
    # Row of (k + 0.5) * s for k in -127..126 plus the extreme 127 * s that fixes scale = s.
    # With s = m * 2**e and m <= 3 every element is exact in float32, and so is x / s (IEEE division
    # is correctly rounded and the quotient k + 0.5 is representable): each element is a true tie.
    s = np.float32(scale)
    k = np.arange(-127, 127)
    row = np.concatenate([(k + 0.5) * scale, [127 * scale]]).astype(np.float32)
    assert ((row[:-1].astype(np.float64) / scale) == k + 0.5).all()  # the ties are exact
    q, scales = quantize_rows(row[None, :])
    assert scales[0] == s
    # Python's round() rounds half to even (stdlib docs): 0.5 -> 0, 1.5 -> 2, 2.5 -> 2, -0.5 -> 0, -1.5 -> -2
    expected = np.array([round(v) for v in k + 0.5] + [127])
    np.testing.assert_array_equal(q[0], expected)
    np.testing.assert_array_equal(q, _ref_quantize(quantize_ref, row[None, :], scales))
    assert list(q[0, 125:129]) == [-2, 0, 0, 2]  # k = -2..1: -1.5, -0.5, 0.5, 1.5


def test_saturation_matches_quantizelinear_on_subnormal_rows(quantize_ref):
    # The only way x / scale leaves [-127, 127] is a subnormal scale, whose lost precision makes
    # max|row| / scale larger than 127: e.g. 189 * 2**-149 / 127 rounds to 2**-149 (1 ulp), so
    # x / scale = 189. QuantizeLinear saturates that to 127 (spec); we must too, never wrap to -128.
    ulp = np.float32(2.0 ** -149)  # smallest positive subnormal float32
    rows = np.array([[189 * ulp, 3 * ulp, 0.0], [190 * ulp, -189 * ulp, ulp]], dtype=np.float32)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("error")
        q, scales = quantize_rows(rows)
        ref = _ref_quantize(quantize_ref, rows, scales)
    assert (scales == ulp).all()
    assert q[0, 0] == 127 and ref[0, 0] == 127  # +189 saturates at the top of both ranges
    # QuantizeLinear saturates negatives to -128; our documented symmetric range stops at -127
    assert ref[1, 1] == -128 and q[1, 1] == -127
    np.testing.assert_array_equal(q, np.maximum(ref, -QMAX))


def test_huge_and_tiny_magnitudes_stay_finite(quantize_ref):
    # 1e38, not float32 max: fl(max / 127) * 127 rounds above float32 max, so a row holding the
    # largest float32 would dequantise to inf (no trained table comes near; noted in the report)
    big = np.float32(1e38)
    rows = np.array([[big, -big, 1.0], [TINY32, -TINY32, 0.0]], dtype=np.float32)
    q, scales = quantize_rows(rows)
    assert np.isfinite(scales).all() and (scales > 0).all()
    np.testing.assert_array_equal(q, _ref_quantize(quantize_ref, rows, scales))
    assert np.isfinite(dequantize_rows(q, scales)).all()


_PROPERTY_REF = _evaluator("QuantizeLinear", 19)


@settings(max_examples=150, deadline=None, database=None)  # database=None: nothing written to the working dir
@given(hnp.arrays(np.float32, st.tuples(st.integers(1, 6), st.integers(1, 40)),
                  elements=st.floats(-1e6, 1e6, width=32, allow_subnormal=False)))
def test_quantize_matches_quantizelinear_property(table):
    # any table without subnormal scales: bit-identical to the spec's arithmetic (opset 19)
    scales_ok = np.abs(table).max(axis=1) >= QMAX * TINY32
    table = table[scales_ok]
    if table.shape[0] == 0:
        return
    q, scales = quantize_rows(table)
    np.testing.assert_array_equal(q, _ref_quantize(_PROPERTY_REF, table, scales))


def test_chunked_processing_equals_one_block(monkeypatch):
    # the module works in blocks of CHUNK_ROWS rows to bound memory on 400k-row tables:
    # block boundaries (here every 7 rows) must not change any value
    table = _random_table(seed=3, rows=100, width=9)
    whole = quantize_rows(table)
    monkeypatch.setattr(quantize_module, "CHUNK_ROWS", 7)
    chunked = quantize_rows(table)
    np.testing.assert_array_equal(whole[0], chunked[0])
    np.testing.assert_array_equal(whole[1], chunked[1])


# --- all-zero rows ------------------------------------------------------------------------

def test_all_zero_rows_have_scale_zero_and_dequantise_to_zero():
    table = _random_table(seed=1, rows=20, width=8)
    table[[0, 5, 19]] = 0.0
    table[7] = -0.0  # negative zero is a zero row too
    with np.errstate(all="raise"), warnings.catch_warnings():
        warnings.simplefilter("error")  # any RuntimeWarning (division by zero, invalid) fails the test
        q, scales = quantize_rows(table)
        back = dequantize_rows(q, scales)
    zero = [0, 5, 7, 19]
    assert (scales[zero] == 0).all() and (q[zero] == 0).all() and (back[zero] == 0).all()
    others = np.setdiff1d(np.arange(20), zero)
    assert (scales[others] > 0).all()


# --- the error bound ------------------------------------------------------------------------

def test_every_element_within_half_a_scale():
    # Derivation (IEEE 754 binary32, unit roundoff u = 2**-24, each operation rounds once):
    #   q = rint(fl(x / s)), and |x / s| <= 127 (1 + 2u) because s = fl(max|row| / 127).
    #   |fl(x/s) - x/s| <= 127.5 u, so |x - q s| <= s (0.5 + 127.5 u).
    #   The dequantised value fl(q s) adds at most |q s| u <= 127 s u.
    #   Hence |x - fl(q s)| <= s / 2 + 255 u s < s / 2 + 2**-16 s  (= s/2 + 256 u s).
    # Differences are taken in float64, where they are exact for these operands.
    # Rows whose scale would be subnormal are excluded (see the saturation test: the bound
    # cannot hold there, and no trained embedding row is below 1.5e-36 in magnitude).
    table = _random_table(seed=2, rows=2000, width=64)
    q, scales = quantize_rows(table)
    back = dequantize_rows(q, scales)
    err = np.abs(back.astype(np.float64) - table.astype(np.float64))  # (V, D)
    s = scales.astype(np.float64)[:, None]  # (V, 1)
    allowance = 256 * U32 * s
    assert (err <= s / 2 + allowance).all()
    # the bound is not vacuous: some element is almost half a step away
    assert (err / s).max() > 0.49


# --- agreement with DequantizeLinear --------------------------------------------------------

def test_dequantize_matches_dequantizelinear(dequantize_ref):
    table = _random_table(seed=4, rows=300, width=33)
    table[3] = 0.0
    q, scales = quantize_rows(table)
    ours = dequantize_rows(q, scales)
    ref = dequantize_ref.run(None, {"x": q, "scale": scales, "zero": np.zeros(len(scales), np.int8)})[0]
    assert ours.dtype == np.float32
    np.testing.assert_array_equal(ours, ref)


def test_dequantize_all_int8_values(dequantize_ref):
    # every int8 code (including -128, which quantize_rows never makes) times a few scales
    q = np.tile(np.arange(-128, 128, dtype=np.int8), (4, 1))  # (4, 256)
    scales = np.array([0.0, 1.0, 0.0123, 3.5e-20], dtype=np.float32)
    ref = dequantize_ref.run(None, {"x": q, "scale": scales, "zero": np.zeros(4, np.int8)})[0]
    np.testing.assert_array_equal(dequantize_rows(q, scales), ref)
