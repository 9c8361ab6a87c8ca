"""Compiled integer kernels shared by the encoder's parallel pass and the decoder's loop:
the network's products (`dense`, `dot`, `conv_rows`: uint8 activations times int8 weights,
summed in int32) and its requantisation.

Requantisation as the model file defines it: out = (acc * mult + 2**(shift - 1)) >> shift
in int64 (exact: the loader checks |acc| * mult < 2**52), clamped to 0..255 after ReLU
layers. `native` compiles them (ahead of time, or with numba's JIT); this module imports
neither numba nor llvmlite until then.
"""

from __future__ import annotations

import functools

import numpy as np

from rowcast import native
from rowcast.native import jit


@jit
def requantised(acc: np.int64, mult: np.int64, shift: int, relu: bool) -> np.int64:
    """One accumulator requantised."""
    out = (acc * mult + (np.int64(1) << (shift - 1))) >> shift
    if relu:
        out = min(max(out, 0), 255)
    return out


@jit
def requantise_into(acc, bias, mult, shift, relu, out):
    """out[i, j] = requantised(acc[i, j] + bias[j]) for accumulators (N, C >= len(bias)),
    into the first len(bias) columns of out (N, ...): one pass instead of numpy's five."""
    for i in range(out.shape[0]):
        for j in range(len(bias)):
            out[i, j] = requantised(np.int64(acc[i, j]) + bias[j], mult[j], shift, relu)


# Matrix products of uint8 activations and int8 weights, summed exactly in int32 (a layer's
# bound, checked at load, keeps every sum far below 2**31). Where the machine code numba
# emits may use AVX-512 VNNI, each vpdpbusd instruction multiplies 64 pairs and adds them
# four by four into 16 int32 lanes (measured here on one core: 117-175 GMAC/s, against 26
# for the int16 loop this replaced and 48 for float32 BLAS at the decoder's shapes);
# elsewhere the block is plain LLVM vector code, which every target compiles (x86 without
# VNNI gets pmaddwd from it: 15-25 GMAC/s). Both give the same integers: they add the same
# products exactly.

LANES = 16  # int32 outputs per accumulator vector


def _uses_vnni(context) -> bool:
    """Whether the code numba emits may use AVX-512 VNNI: the features it compiles for
    (which NUMBA_CPU_NAME / NUMBA_CPU_FEATURES may narrow), or when it compiles ahead of
    time for this machine ("host"), this CPU's."""
    codegen = context.codegen()
    features = getattr(codegen, "_tm_features", "")
    if not features and getattr(codegen, "_cpu_name", "") == "host":
        features = codegen._get_host_cpu_features()
    return "+avx512vnni" in features


def vnni() -> bool:
    """Whether this process's products use AVX-512 VNNI."""
    from numba.core.registry import cpu_target

    return _uses_vnni(cpu_target.target_context)


def _dot4(builder, acc, quad, weights, vnni: bool):
    """acc (16 x i32) plus, in each lane, the four products of `quad` (four uint8 in an
    i32) with that lane's four int8 weights in `weights` (64 x i8)."""
    from llvmlite import ir
    from numba.core import cgutils

    v16 = ir.VectorType(ir.IntType(32), LANES)
    if vnni:
        fn = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(v16, [v16, v16, v16]),
            "llvm.x86.avx512.vpdpbusd.512")
        spread = builder.shuffle_vector(
            builder.insert_element(ir.Constant(v16, ir.Undefined), quad,
                                   ir.Constant(ir.IntType(32), 0)),
            ir.Constant(v16, ir.Undefined), ir.Constant(v16, [0] * LANES))
        return builder.call(fn, [acc, spread, builder.bitcast(weights, v16)])
    # pairs of products summed as pmaddwd does, so x86 targets without VNNI get that
    half, pairs = ir.VectorType(ir.IntType(16), 4 * LANES), ir.VectorType(ir.IntType(32), 2 * LANES)
    four = builder.bitcast(quad, ir.VectorType(ir.IntType(8), 4))
    spread = builder.zext(builder.shuffle_vector(
        four, ir.Constant(four.type, ir.Undefined),
        ir.Constant(ir.VectorType(ir.IntType(32), 4 * LANES), [t % 4 for t in range(4 * LANES)])),
        half)
    signed = builder.sext(weights, half)

    def picked(v, n, t):  # elements t, t + 2, t + 4 ... of v, n of them
        return builder.shuffle_vector(v, ir.Constant(v.type, ir.Undefined),
                                      ir.Constant(ir.VectorType(ir.IntType(32), n),
                                                  [2 * i + t for i in range(n)]))

    two = builder.add(*(builder.mul(builder.sext(picked(spread, 2 * LANES, t), pairs),
                                    builder.sext(picked(signed, 2 * LANES, t), pairs))
                        for t in (0, 1)))
    acc = builder.add(acc, builder.add(picked(two, LANES, 0), picked(two, LANES, 1)))
    return acc


def _block(vectors: int):
    """An intrinsic block(a, a_at, w, w_at, out, out_at, quads, add): out[out_at : out_at + 16
    * vectors] = (out's values, when `add`, plus) the int32 dot products of a[a_at : a_at +
    4 * quads] (uint8) with as many outputs' weights, packed from w[w_at] as (quads, 16 *
    vectors, 4) int8."""
    from llvmlite import ir
    from numba import types
    from numba.core import cgutils
    from numba.extending import intrinsic

    v16 = ir.VectorType(ir.IntType(32), LANES)

    @intrinsic
    def block(typingctx, a, a_at, w, w_at, out, out_at, quads, add):
        def codegen(context, builder, sig, args):
            a_, a_at_, w_, w_at_, out_, out_at_, quads_, add_ = args
            bytes_ = ir.IntType(8).as_pointer()
            pa = builder.gep(builder.bitcast(
                context.make_array(sig.args[0])(context, builder, a_).data, bytes_), [a_at_])
            pw = builder.gep(builder.bitcast(
                context.make_array(sig.args[2])(context, builder, w_).data, bytes_), [w_at_])
            po = builder.gep(context.make_array(sig.args[4])(context, builder, out_).data,
                             [out_at_])
            vnni = _uses_vnni(context)
            weights = ir.VectorType(ir.IntType(8), 4 * LANES)
            start = [builder.bitcast(builder.gep(po, [ir.Constant(ir.IntType(64), LANES * v)]),
                                     v16.as_pointer()) for v in range(vectors)]
            flag = context.cast(builder, add_, sig.args[7], types.boolean)
            accs = [cgutils.alloca_once_value(builder, builder.select(
                flag, builder.load(at, align=4), ir.Constant(v16, [0] * LANES)))
                for at in start]
            with cgutils.for_range(builder, quads_) as loop:
                i = loop.index
                quad = builder.load(builder.bitcast(
                    builder.gep(pa, [builder.mul(i, i.type(4))]), ir.IntType(32).as_pointer()),
                    align=1)
                row = builder.mul(i, i.type(4 * LANES * vectors))
                for v, slot in enumerate(accs):
                    at = builder.gep(pw, [builder.add(row, i.type(4 * LANES * v))])
                    wv = builder.load(builder.bitcast(at, weights.as_pointer()), align=1)
                    builder.store(_dot4(builder, builder.load(slot), quad, wv, vnni), slot)
            for at, slot in zip(start, accs, strict=True):
                builder.store(builder.load(slot), at, align=4)
            return context.get_dummy_value()

        return types.void(a, a_at, w, w_at, out, out_at, quads, add), codegen

    return block


_block1 = _block2 = _block3 = _block4 = None  # intrinsics: made when compiling (`native`)
for _v in (1, 2, 3, 4):
    native.later("intkernels", f"_block{_v}", functools.partial(_block, _v))


def packed(weight: np.ndarray) -> np.ndarray:
    """Weights (cout, cin) in `dot`'s layout: outputs padded to a multiple of 16 and inputs
    to a multiple of 4 with zeros, in blocks of 64 outputs (then one of the rest), each
    block (cin / 4, outputs, 4); int8, flat."""
    cout, cin = weight.shape
    w = np.zeros((-(-cout // LANES) * LANES, -(-cin // 4) * 4), np.int8)
    w[:cout, :cin] = weight
    blocks = [w[j : j + 4 * LANES] for j in range(0, len(w), 4 * LANES)]
    return np.concatenate([b.reshape(len(b), -1, 4).transpose(1, 0, 2).ravel() for b in blocks])


@jit(inline="always")
def dot(a, a_at, w, n, j, out, out_at, quads, add):
    """Outputs j.. (a multiple of 64; up to 64 of them) of n (padded) whose weights `packed`
    put in w: out[out_at:] = (out's values, when `add`, plus) their dot products with the
    4 * quads uint8 at a[a_at:] (flat arrays)."""
    vectors = min(4, (n - j) // LANES)
    w_at = j * 4 * quads
    if vectors == 4:
        _block4(a, a_at, w, w_at, out, out_at, quads, add)
    elif vectors == 3:
        _block3(a, a_at, w, w_at, out, out_at, quads, add)
    elif vectors == 2:
        _block2(a, a_at, w, w_at, out, out_at, quads, add)
    else:
        _block1(a, a_at, w, w_at, out, out_at, quads, add)


@jit
def dense(a, w, out):
    """out (M, N) int32 = a (M, K) uint8 @ the weights `packed` into w, for N outputs padded
    to a multiple of 16 and K inputs padded to a multiple of 4 (C-contiguous arrays)."""
    m, k = a.shape
    n = out.shape[1]
    flat_a, flat_out = a.reshape(-1), out.reshape(-1)
    for j in range(0, n, 4 * LANES):  # a block's weights stay in cache over the rows
        for i in range(m):
            dot(flat_a, i * k, w, n, j, flat_out, i * n + j, k // 4, False)


@functools.cache
def conv_weights(layer) -> np.ndarray:
    """A model layer's weights (cout, cin, kh, kw) as `conv_rows` takes them: for each
    kernel row, the (cout, kw * cin) weights of its kw pixels, cin padded to a multiple of
    4, `packed`; (kh, packed length) int8, made once per layer (the encoder's passes and the
    decoder's kernel share them)."""
    weight = layer.weight
    cout, cin, kh, kw = weight.shape
    w = np.zeros((cout, kh, kw, -(-cin // 4) * 4), np.int8)
    w[..., :cin] = weight.transpose(0, 2, 3, 1)
    return np.stack([packed(w[:, i].reshape(cout, -1)) for i in range(kh)])


@jit
def conv_rows(p, w, bias, mult, shift, relu, out):
    """A layer's requantised outputs out (B, H, W, cout) from its padded input p (B, H + kh -
    1, W + kw - 1, cin) uint8, cin a multiple of 4, and its `conv_weights` w. An output's
    window is kw * cin contiguous bytes of each of kh input rows, so its products are kh
    `dot`s that read the input in place; a row's accumulators are requantised as it ends."""
    batch, height, width, cout = out.shape
    kh, cin = w.shape[0], p.shape[3]
    quads = (p.shape[2] - width + 1) * cin // 4
    n = -(-cout // LANES) * LANES
    length = p.shape[2] * cin
    flat = p.reshape(-1)
    acc = np.empty(width * n, np.int32)
    for b in range(batch):
        for y in range(height):
            for j in range(0, n, 4 * LANES):  # a block's weights stay in cache over the row
                for x in range(width):
                    for i in range(kh):
                        at = (b * p.shape[1] + y + i) * length + x * cin
                        dot(flat, at, w[i], n, j, acc, x * n + j, quads, i > 0)
            requantise_into(acc.reshape(width, n), bias, mult, shift, relu, out[b, y])
