"""Eight-lane double-precision arithmetic for numba kernels (explicit SIMD).

A lane vector is a numba ``UniTuple(float64, 8)``: a plain tuple of eight floats to Python and
numba alike.  The functions below are numba intrinsics that lower each operation to one LLVM
vector instruction on ``<8 x double>`` (an AVX-512 register, or two AVX2 ones), so code written
with them runs eight independent computations (eight orbits) per instruction without relying
on the auto-vectoriser (numba switches LLVM's SLP vectoriser off by default).

Only usable inside ``numba.njit`` code.  Arithmetic carries LLVM's ``contract`` flag (fused
multiply-add allowed), like the rest of the orbit engine; nothing else is relaxed, so every
lane rounds as IEEE scalar code with contraction would.
"""

from __future__ import annotations

from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

#: lanes per vector
W = 8
V8 = types.UniTuple(types.float64, W)
_DBL = ir.DoubleType()
_VTY = ir.VectorType(_DBL, W)
_I32 = ir.IntType(32)
_FLAGS = ("contract",)


def _to_vec(builder, tup):
    v = ir.Constant(_VTY, ir.Undefined)
    for i in range(W):
        v = builder.insert_element(v, builder.extract_value(tup, i), ir.Constant(_I32, i))
    return v


def _from_vec(builder, vec):
    t = ir.Constant(ir.ArrayType(_DBL, W), ir.Undefined)
    for i in range(W):
        t = builder.insert_value(t, builder.extract_element(vec, ir.Constant(_I32, i)), i)
    return t


def _binary(op):
    def make(typingctx, a, b):
        if a != V8 or b != V8:
            return None

        def codegen(context, builder, sig, args):
            x, y = (_to_vec(builder, t) for t in args)
            return _from_vec(builder, getattr(builder, op)(x, y, flags=_FLAGS))

        return V8(V8, V8), codegen

    return intrinsic(make)


def _llvm_unary(name):
    def make(typingctx, a):
        if a != V8:
            return None

        def codegen(context, builder, sig, args):
            fn = cgutils.get_or_insert_function(builder.module, ir.FunctionType(_VTY, [_VTY]),
                                                f"{name}.v{W}f64")
            return _from_vec(builder, builder.call(fn, [_to_vec(builder, args[0])]))

        return V8(V8), codegen

    return intrinsic(make)


def _llvm_binary(name):
    def make(typingctx, a, b):
        if a != V8 or b != V8:
            return None

        def codegen(context, builder, sig, args):
            fn = cgutils.get_or_insert_function(builder.module, ir.FunctionType(_VTY, [_VTY, _VTY]),
                                                f"{name}.v{W}f64")
            x, y = (_to_vec(builder, t) for t in args)
            return _from_vec(builder, builder.call(fn, [x, y]))

        return V8(V8, V8), codegen

    return intrinsic(make)


add = _binary("fadd")
sub = _binary("fsub")
mul = _binary("fmul")
div = _binary("fdiv")
sqrt = _llvm_unary("llvm.sqrt")
fabs = _llvm_unary("llvm.fabs")
#: lane-wise maximum (IEEE maxNum: a NaN operand yields the other one)
maximum = _llvm_binary("llvm.maxnum")


@intrinsic
def splat(typingctx, s):
    """The scalar ``s`` in every lane."""
    if not isinstance(s, types.Float) and not isinstance(s, types.Integer):
        return None

    def codegen(context, builder, sig, args):
        x = context.cast(builder, args[0], sig.args[0], types.float64)
        v = ir.Constant(_VTY, ir.Undefined)
        for i in range(W):
            v = builder.insert_element(v, x, ir.Constant(_I32, i))
        return _from_vec(builder, v)

    return V8(s), codegen


@intrinsic
def where_less(typingctx, a, b, x, y):
    """Lane-wise ``x if a < b else y`` (ordered comparison: a NaN lane gives y)."""
    if not all(t == V8 for t in (a, b, x, y)):
        return None

    def codegen(context, builder, sig, args):
        va, vb, vx, vy = (_to_vec(builder, t) for t in args)
        mask = builder.fcmp_ordered("<", va, vb)
        return _from_vec(builder, builder.select(mask, vx, vy))

    return V8(V8, V8, V8, V8), codegen


@intrinsic
def log1p(typingctx, a):
    """Lane-wise ``log1p`` (eight calls to the C library's scalar log1p: LLVM has no vector
    form of it)."""
    if a != V8:
        return None

    def codegen(context, builder, sig, args):
        fnty = ir.FunctionType(_DBL, [_DBL])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "log1p")
        t = ir.Constant(ir.ArrayType(_DBL, W), ir.Undefined)
        for i in range(W):
            t = builder.insert_value(t, builder.call(fn, [builder.extract_value(args[0], i)]), i)
        return t

    return V8(V8), codegen
