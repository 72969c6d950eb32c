"""A 16-bit SIMD vector type for the numba kernels.

numba types integer arithmetic on ``uint16`` scalars as 64-bit, so a loop over
16-bit costs is vectorised with 64-bit lanes: a quarter of the work per
instruction that the data allow. These intrinsics emit LLVM vector IR on
``LANES`` unsigned 16-bit lanes directly; LLVM lowers it to whatever the CPU
has (one AVX-512 register, two AVX2 registers, four SSE2 registers).

All arithmetic is modular 16-bit except :func:`vadds`, which saturates at
0xFFFF (so that "infinite" sentinels stay infinite when a penalty is added).
Loads and stores take a C-contiguous array and a flat element index and need
no alignment; the caller keeps ``index + LANES`` inside the array.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic, models, register_model

LANES = 32
"""Lanes per vector; volumes are padded to a multiple of this along the hypothesis axis."""

_I16 = ir.IntType(16)
_I32 = ir.IntType(32)
_VEC = ir.VectorType(_I16, LANES)
_LANE_INDEX = ir.Constant(_VEC, list(range(LANES)))


class U16Vector(types.Type):
    """``LANES`` unsigned 16-bit integers held in registers."""

    def __init__(self):
        super().__init__(name=f"u16x{LANES}")


u16vec = U16Vector()


@register_model(U16Vector)
class _U16VectorModel(models.PrimitiveModel):
    def __init__(self, dmm, fe_type):
        super().__init__(dmm, fe_type, _VEC)


def _element_pointer(context, builder, array_type, array, index):
    data = context.make_array(array_type)(context, builder, array).data
    return builder.gep(data, [index])


def _splat(builder, scalar):
    """A full vector (512 bits: 32 lanes of i16, 64 of i8) of the integer ``scalar``."""
    lanes = LANES * 16 // scalar.type.width
    vec_type = ir.VectorType(scalar.type, lanes)
    vec = builder.insert_element(ir.Constant(vec_type, ir.Undefined), scalar,
                                 ir.Constant(_I32, 0))
    zeros = ir.Constant(ir.VectorType(_I32, lanes), [0] * lanes)
    return builder.shuffle_vector(vec, ir.Constant(vec_type, ir.Undefined), zeros)


def _to_i16(builder, value, value_type):
    width = value_type.bitwidth
    if width > 16:
        return builder.trunc(value, _I16)
    if width < 16:
        return builder.zext(value, _I16)
    return value


def _call(builder, name, ret, *args):
    fn = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(ret, [a.type for a in args]), name
    )
    return builder.call(fn, list(args))


@intrinsic
def vload(typingctx, array, index):
    """``array.flat[index : index + LANES]`` of a uint8 (zero-extended) or uint16 array."""
    if not isinstance(array, types.Array) or array.dtype not in (types.uint8, types.uint16):
        return None
    sig = u16vec(array, types.intp)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        bits = signature.args[0].dtype.bitwidth
        src = ir.VectorType(ir.IntType(bits), LANES)
        vec = builder.load(builder.bitcast(ptr, src.as_pointer()), align=bits // 8)
        return builder.zext(vec, _VEC) if bits == 8 else vec

    return sig, codegen


@intrinsic
def vhamming(typingctx, array, index, bits):
    """Hamming distances ``popcount(array.flat[index + i] ^ bits)`` of a uint16 array."""
    if not isinstance(array, types.Array) or array.dtype != types.uint16:
        return None
    if not isinstance(bits, types.Integer):
        return None
    sig = u16vec(array, types.intp, bits)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        vec = builder.load(builder.bitcast(ptr, _VEC.as_pointer()), align=2)
        mixed = builder.xor(vec, _splat(builder, _to_i16(builder, args[2], signature.args[2])))
        return _call(builder, f"llvm.ctpop.v{LANES}i16", _VEC, mixed)

    return sig, codegen


@intrinsic
def vstore(typingctx, array, index, vec):
    """Store ``vec`` at ``array.flat[index : index + LANES]`` of a uint16 array.

    Into a uint8 array each lane saturates at 255.
    """
    if not isinstance(array, types.Array) or array.dtype not in (types.uint8, types.uint16):
        return None
    sig = types.void(array, types.intp, u16vec)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        bits = signature.args[0].dtype.bitwidth
        vec = args[2]
        if bits == 8:
            top = ir.Constant(_VEC, [255] * LANES)
            vec = builder.select(builder.icmp_unsigned(">", vec, top), top, vec)
            vec = builder.trunc(vec, ir.VectorType(ir.IntType(8), LANES))
        builder.store(vec, builder.bitcast(ptr, vec.type.as_pointer()), align=bits // 8)
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def vsplat(typingctx, value):
    """Every lane set to ``value`` (an integer, truncated to 16 bits)."""
    if not isinstance(value, types.Integer):
        return None
    sig = u16vec(value)

    def codegen(context, builder, signature, args):
        return _splat(builder, _to_i16(builder, args[0], signature.args[0]))

    return sig, codegen


def _binary(emit, doc, vec_type=None):
    """A lane-wise intrinsic of two vectors of ``vec_type`` (16-bit by default)."""

    @intrinsic
    def op(typingctx, a, b):
        vec = vec_type or u16vec
        if a != vec or b != vec:
            return None
        sig = vec(vec, vec)

        def codegen(context, builder, signature, args):
            return emit(builder, *args)

        return sig, codegen

    op.__doc__ = doc
    return op


vadd = _binary(lambda b, x, y: b.add(x, y), "Lane-wise ``a + b`` modulo 2**16.")
vsub = _binary(lambda b, x, y: b.sub(x, y), "Lane-wise ``a - b`` modulo 2**16.")
vand = _binary(lambda b, x, y: b.and_(x, y), "Lane-wise bitwise ``a & b``.")
vmax = _binary(lambda b, x, y: b.select(b.icmp_unsigned(">", x, y), x, y), "Lane-wise maximum.")
def _add_saturated(builder, x, y):
    name = f"llvm.uadd.sat.v{x.type.count}i{x.type.element.width}"
    return _call(builder, name, x.type, x, y)


def _minimum(builder, x, y):
    return builder.select(builder.icmp_unsigned("<", x, y), x, y)


vadds = _binary(_add_saturated, "Lane-wise ``a + b`` saturated at 0xFFFF.")
vmin = _binary(_minimum, "Lane-wise minimum.")


@intrinsic
def vhmin(typingctx, vec):
    """Smallest lane, as a uint16 scalar."""
    if vec != u16vec:
        return None
    sig = types.uint16(u16vec)

    def codegen(context, builder, signature, args):
        return _call(builder, f"llvm.vector.reduce.umin.v{LANES}i16", _I16, args[0])

    return sig, codegen


@intrinsic
def vfill_outside(typingctx, vec, lo, hi, value):
    """``vec`` with every lane whose index is not in ``[lo, hi)`` set to ``value``.

    ``lo`` and ``hi`` are lane indices relative to the vector (any integers).
    """
    if vec != u16vec or not all(isinstance(t, types.Integer) for t in (lo, hi, value)):
        return None
    sig = u16vec(u16vec, types.intp, types.intp, value)

    def codegen(context, builder, signature, args):
        v, lo_, hi_, fill = args
        fill_v = _splat(builder, _to_i16(builder, fill, signature.args[3]))
        return builder.select(_in_range(builder, _LANE_INDEX, lo_, hi_), v, fill_v)

    return sig, codegen


def _in_range(builder, key, lo, hi):
    """Lane mask of ``lo <= key < hi``; ``lo``, ``hi`` are i64 clamped to the lanes' range."""
    i64 = ir.IntType(64)
    lane = key.type.element
    top = (1 << lane.width) - 1

    def clamp(x):
        x = builder.select(builder.icmp_signed("<", x, ir.Constant(i64, 0)),
                           ir.Constant(i64, 0), x)
        return builder.select(builder.icmp_signed(">", x, ir.Constant(i64, top)),
                              ir.Constant(i64, top), x)

    lo_c = clamp(lo)
    hi_c = clamp(hi)
    hi_c = builder.select(builder.icmp_signed("<", hi_c, lo_c), lo_c, hi_c)
    # lo <= key < hi  <=>  (key - lo) mod 2**bits < hi - lo, unsigned.
    shifted = builder.sub(key, _splat(builder, builder.trunc(lo_c, lane)))
    width = _splat(builder, builder.trunc(builder.sub(hi_c, lo_c), lane))
    return builder.icmp_unsigned("<", shifted, width)


def _select_compare(predicate, doc):
    @intrinsic
    def op(typingctx, a, b, if_true, otherwise):
        if not all(t == u16vec for t in (a, b, if_true, otherwise)):
            return None
        sig = u16vec(u16vec, u16vec, u16vec, u16vec)

        def codegen(context, builder, signature, args):
            x, y, yes, no = args
            return builder.select(builder.icmp_unsigned(predicate, x, y), yes, no)

        return sig, codegen

    op.__doc__ = doc
    return op


vselect_equal = _select_compare("==", "Lane-wise ``if_true if a == b else otherwise``.")
vselect_less = _select_compare("<", "Lane-wise ``if_true if a < b else otherwise`` (unsigned).")


@intrinsic
def vselect_between(typingctx, key, lo, hi, if_true, otherwise):
    """Lane-wise ``if_true if lo <= key < hi else otherwise``.

    ``lo`` and ``hi`` are integers, clamped to the 16-bit range.
    """
    if key != u16vec or if_true != u16vec or otherwise != u16vec:
        return None
    if not isinstance(lo, types.Integer) or not isinstance(hi, types.Integer):
        return None
    sig = u16vec(u16vec, types.intp, types.intp, u16vec, u16vec)

    def codegen(context, builder, signature, args):
        k, lo_, hi_, yes, no = args
        return builder.select(_in_range(builder, k, lo_, hi_), yes, no)

    return sig, codegen


@intrinsic
def vlane_index(typingctx, offset):
    """The vector ``offset, offset + 1, ..., offset + LANES - 1`` (16-bit)."""
    if not isinstance(offset, types.Integer):
        return None
    sig = u16vec(offset)

    def codegen(context, builder, signature, args):
        base = _splat(builder, _to_i16(builder, args[0], signature.args[0]))
        return builder.add(base, _LANE_INDEX)

    return sig, codegen


def _shuffle_pair(offset, doc, vec_type=None):
    # Lanes offset .. offset + n - 1 of the concatenation (a, b) of n-lane vectors.
    @intrinsic
    def op(typingctx, a, b):
        vec = vec_type or u16vec
        if a != vec or b != vec:
            return None
        sig = vec(vec, vec)

        def codegen(context, builder, signature, args):
            n = args[0].type.count
            mask = ir.Constant(ir.VectorType(_I32, n), [offset + i for i in range(n)])
            return builder.shuffle_vector(args[0], args[1], mask)

        return sig, codegen

    op.__doc__ = doc
    return op


vshift_in_low = _shuffle_pair(LANES - 1, """``vshift_in_low(below, cur)``: lane k holds entry k - 1.

That is ``(below[LANES - 1], cur[0], ..., cur[LANES - 2])``.""")
vshift_in_high = _shuffle_pair(1, """``vshift_in_high(cur, above)``: lane k holds entry k + 1.

That is ``(cur[1], ..., cur[LANES - 1], above[0])``.""")


@intrinsic
def vstream(typingctx, array, index, vec):
    """Store ``vec`` at ``array.flat[index : index + LANES]`` bypassing the caches.

    For data written once and read much later (it saves reading the line
    first). The address must be aligned to the vector size (64 bytes for 32
    lanes).
    """
    if not isinstance(array, types.Array) or array.dtype != types.uint16:
        return None
    sig = types.void(array, types.intp, u16vec)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        store = builder.store(args[2], builder.bitcast(ptr, _VEC.as_pointer()), align=2 * LANES)
        store.set_metadata("nontemporal", builder.module.add_metadata([ir.Constant(_I32, 1)]))
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def prefetch(typingctx, array, index):
    """Hint the CPU to fetch the cache line holding ``array.flat[index]`` for reading."""
    if not isinstance(array, types.Array):
        return None
    sig = types.void(array, types.intp)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        i8p = ir.IntType(8).as_pointer()
        _call(builder, "llvm.prefetch.p0i8", ir.VoidType(), builder.bitcast(ptr, i8p),
              ir.Constant(_I32, 0), ir.Constant(_I32, 3), ir.Constant(_I32, 1))
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def cycle_counter(typingctx):
    """The CPU's time-stamp counter (for load balancing; ticks at a constant rate)."""
    sig = types.int64()

    def codegen(context, builder, signature, args):
        return _call(builder, "llvm.readcyclecounter", ir.IntType(64))

    return sig, codegen


# Lane shifts by 2, 4, 8 and 16, for log-step scans across the lanes (a distance
# transform within one vector takes one shift per doubling of its reach).
vshift_in_low2 = _shuffle_pair(LANES - 2, "``vshift_in_low2(below, cur)``: lane k holds k - 2.")
vshift_in_low4 = _shuffle_pair(LANES - 4, "``vshift_in_low4(below, cur)``: lane k holds k - 4.")
vshift_in_low8 = _shuffle_pair(LANES - 8, "``vshift_in_low8(below, cur)``: lane k holds k - 8.")
vshift_in_low16 = _shuffle_pair(LANES - 16,
                                "``vshift_in_low16(below, cur)``: lane k holds entry k - 16.")
vshift_in_high2 = _shuffle_pair(2, "``vshift_in_high2(cur, above)``: lane k holds entry k + 2.")
vshift_in_high4 = _shuffle_pair(4, "``vshift_in_high4(cur, above)``: lane k holds entry k + 4.")
vshift_in_high8 = _shuffle_pair(8, "``vshift_in_high8(cur, above)``: lane k holds entry k + 8.")
vshift_in_high16 = _shuffle_pair(16, "``vshift_in_high16(cur, above)``: lane k holds entry k + 16.")

vmul = _binary(lambda b, x, y: b.mul(x, y), "Lane-wise ``a * b`` modulo 2**16.")


@intrinsic
def vget(typingctx, vec, lane):
    """Lane ``lane`` (an integer in ``[0, LANES)``) as a uint16 scalar."""
    if vec != u16vec or not isinstance(lane, types.Integer):
        return None
    sig = types.uint16(u16vec, types.intp)

    def codegen(context, builder, signature, args):
        return builder.extract_element(args[0], builder.trunc(args[1], _I32))

    return sig, codegen


def _shift_by_scalar(emit, doc):
    @intrinsic
    def op(typingctx, vec, count):
        if vec != u16vec or not isinstance(count, types.Integer):
            return None
        sig = u16vec(u16vec, types.intp)

        def codegen(context, builder, signature, args):
            return emit(builder, args[0], _splat(builder, builder.trunc(args[1], _I16)))

        return sig, codegen

    op.__doc__ = doc
    return op


vshl = _shift_by_scalar(lambda b, x, n: b.shl(x, n),
                        "Every lane shifted left by ``count`` bits (``0 <= count < 16``).")
vshr = _shift_by_scalar(lambda b, x, n: b.lshr(x, n),
                        "Every lane shifted right by ``count`` bits, zero-filled (0 to 15).")


# --- 8-bit vectors -------------------------------------------------------------
#
# Twice the lanes of the 16-bit vectors, for recurrences whose values stay
# below 256 (the semi-global path costs with small penalties): the same
# instruction then advances twice the hypotheses. Sums that outgrow a byte are
# widened into 16-bit vectors with :func:`bwiden_low` and :func:`bwiden_high`.

BYTE_LANES = 2 * LANES
_I8 = ir.IntType(8)
_BVEC = ir.VectorType(_I8, BYTE_LANES)
_BYTE_INDEX = ir.Constant(_BVEC, list(range(BYTE_LANES)))


class U8Vector(types.Type):
    """``BYTE_LANES`` unsigned 8-bit integers held in registers."""

    def __init__(self):
        super().__init__(name=f"u8x{BYTE_LANES}")


u8vec = U8Vector()


@register_model(U8Vector)
class _U8VectorModel(models.PrimitiveModel):
    def __init__(self, dmm, fe_type):
        super().__init__(dmm, fe_type, _BVEC)


@intrinsic
def bload(typingctx, array, index):
    """``array.flat[index : index + BYTE_LANES]`` of a uint8 array."""
    if not isinstance(array, types.Array) or array.dtype != types.uint8:
        return None
    sig = u8vec(array, types.intp)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        return builder.load(builder.bitcast(ptr, _BVEC.as_pointer()), align=1)

    return sig, codegen


@intrinsic
def bstore(typingctx, array, index, vec):
    """Store ``vec`` at ``array.flat[index : index + BYTE_LANES]`` of a uint8 array."""
    if not isinstance(array, types.Array) or array.dtype != types.uint8 or vec != u8vec:
        return None
    sig = types.void(array, types.intp, u8vec)

    def codegen(context, builder, signature, args):
        ptr = _element_pointer(context, builder, signature.args[0], args[0], args[1])
        builder.store(args[2], builder.bitcast(ptr, _BVEC.as_pointer()), align=1)
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def bsplat(typingctx, value):
    """Every lane set to ``value`` (an integer, truncated to 8 bits)."""
    if not isinstance(value, types.Integer):
        return None
    sig = u8vec(value)

    def codegen(context, builder, signature, args):
        v = args[0]
        width = signature.args[0].bitwidth
        v = builder.trunc(v, _I8) if width > 8 else (builder.zext(v, _I8) if width < 8 else v)
        return _splat(builder, v)

    return sig, codegen


bsub = _binary(lambda b, x, y: b.sub(x, y), "Lane-wise ``a - b`` modulo 2**8.", u8vec)
bmin = _binary(_minimum, "Lane-wise minimum.", u8vec)
badds = _binary(_add_saturated, "Lane-wise ``a + b`` saturated at 0xFF.", u8vec)
bshift_in_low = _shuffle_pair(BYTE_LANES - 1,
                              "``bshift_in_low(below, cur)``: lane k holds entry k - 1.", u8vec)
bshift_in_high = _shuffle_pair(1, "``bshift_in_high(cur, above)``: lane k holds entry k + 1.",
                               u8vec)


@intrinsic
def bhmin(typingctx, vec):
    """Smallest lane, as a uint8 scalar."""
    if vec != u8vec:
        return None
    sig = types.uint8(u8vec)

    def codegen(context, builder, signature, args):
        return _call(builder, f"llvm.vector.reduce.umin.v{BYTE_LANES}i8", _I8, args[0])

    return sig, codegen


@intrinsic
def bfill_outside(typingctx, vec, lo, hi, value):
    """``vec`` with every lane whose index is not in ``[lo, hi)`` set to ``value``."""
    if vec != u8vec or not all(isinstance(t, types.Integer) for t in (lo, hi, value)):
        return None
    sig = u8vec(u8vec, types.intp, types.intp, value)

    def codegen(context, builder, signature, args):
        v, lo_, hi_, fill = args
        fill_v = _splat(builder, builder.trunc(fill, _I8) if signature.args[3].bitwidth > 8
                        else fill)
        return builder.select(_in_range(builder, _BYTE_INDEX, lo_, hi_), v, fill_v)

    return sig, codegen


def _widen(half, doc):
    @intrinsic
    def op(typingctx, vec):
        if vec != u8vec:
            return None
        sig = u16vec(u8vec)

        def codegen(context, builder, signature, args):
            mask = ir.Constant(ir.VectorType(_I32, LANES), [half * LANES + i for i in range(LANES)])
            part = builder.shuffle_vector(args[0], ir.Constant(_BVEC, ir.Undefined), mask)
            return builder.zext(part, _VEC)

        return sig, codegen

    op.__doc__ = doc
    return op


bwiden_low = _widen(0, "Lanes ``0 .. LANES - 1`` as a 16-bit vector.")
bwiden_high = _widen(1, "Lanes ``LANES .. BYTE_LANES - 1`` as a 16-bit vector.")


@intrinsic
def bnarrow(typingctx, low, high):
    """The 8-bit vector of ``low`` then ``high`` (16-bit vectors), each lane truncated."""
    if low != u16vec or high != u16vec:
        return None
    sig = u8vec(u16vec, u16vec)

    def codegen(context, builder, signature, args):
        half = ir.VectorType(_I8, LANES)
        a = builder.trunc(args[0], half)
        b = builder.trunc(args[1], half)
        mask = ir.Constant(ir.VectorType(_I32, BYTE_LANES), list(range(BYTE_LANES)))
        return builder.shuffle_vector(a, b, mask)

    return sig, codegen
