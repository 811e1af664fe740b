"""Calling the kernels of model files from every integrator, without recompiling them.

A model file is compiled into five C-callable functions (numba ``cfunc``,
cached on disk by :mod:`spikegauge.models.codegen`): right-hand side,
Jacobian, quasi-linear split and reset of one cell, and the right-hand side
of a block of cells in structure-of-arrays form (a loop LLVM vectorises).
Their addresses sit in one table of this process, :data:`TABLE` (row = model slot, column = kernel),
reachable from compiled code through one exported symbol. The integrators
reach them through :mod:`spikegauge.models.kernels`, whose dispatch sends
every code from ``FIRST_CODE`` on to the wrappers below; the wrappers load the
address from the table at run time. So the integrators, compiled and cached
once, serve every model file, and a new model file compiles only its own five
small functions.

Every array is passed as (data pointer, stride in elements), so rows, columns
and views of any layout can be handed over as they are. Signatures::

    rhs(y, ys, p, ps, clamped, dydt, ds)
    jac(y, ys, p, ps, clamped, J, js0, js1)
    split(y, ys, p, ps, clamped, a, as, b, bs)
    reset(y, ys, p, ps)
    rhs_cols(Y, ys0, ys1, P, ps0, ps1, lo, hi, clamped, cs, F, fs0, fs1)

(pointers to float64 but ``clamped`` of rhs_cols, a pointer to uint8; strides,
``lo``, ``hi`` and the other ``clamped`` int64). rhs_cols reads consecutive
cells from consecutive addresses (its wrapper checks). The numeric helpers the
generated code calls (:func:`safe_ratio` ...) live here too.
"""
from __future__ import annotations

import ctypes
import math

import llvmlite.binding as llvm
import numpy as np
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

from .._numba import inline_jit, jit
from .fastexp import exp as vector_exp

FIRST_CODE = 5
"""Model code of the first model file (codes below are the built-in models)."""

MAX_MODEL_FILES = 256
"""Model files one process can load."""

K_RHS, K_JAC, K_SPLIT, K_RESET, K_RHS_COLS = range(5)
N_KERNELS = 5
TABLE = (ctypes.c_int64 * (N_KERNELS * MAX_MODEL_FILES))()
"""Kernel addresses, row-major (model slot, kernel); 0 where no model is loaded."""

TABLE_SYMBOL = "spikegauge_model_file_kernels"
_TABLE_POINTER = ctypes.c_void_p(ctypes.addressof(TABLE))
# Compiled code reads the table's address from this symbol; cached code links
# against it by name, so it must exist before any kernel is loaded.
llvm.add_symbol(TABLE_SYMBOL, ctypes.addressof(_TABLE_POINTER))

F64P = types.CPointer(types.float64)
SIG_RHS = types.void(F64P, types.int64, F64P, types.int64, types.int64, F64P, types.int64)
SIG_JAC = types.void(F64P, types.int64, F64P, types.int64, types.int64, F64P, types.int64, types.int64)
SIG_SPLIT = types.void(F64P, types.int64, F64P, types.int64, types.int64, F64P, types.int64, F64P, types.int64)
SIG_RESET = types.void(F64P, types.int64, F64P, types.int64)
SIG_RHS_COLS = types.void(F64P, types.int64, types.int64, F64P, types.int64, types.int64, types.int64,
                          types.int64, types.CPointer(types.uint8), types.int64, F64P, types.int64, types.int64)


def install(slot: int, addresses) -> None:
    """Put the kernel addresses (rhs, jac, split, reset, rhs_cols) of model slot ``slot`` in the table."""
    if not 0 <= slot < MAX_MODEL_FILES:
        raise ValueError(f"model slot {slot} outside 0..{MAX_MODEL_FILES - 1}")
    for k, address in enumerate(addresses):
        TABLE[N_KERNELS * slot + k] = int(address)


def _array_args(context, builder, aty, value):
    """(data pointer, strides in elements...) of a numba array value."""
    arr = context.make_array(aty)(context, builder, value)
    strides = cgutils.unpack_tuple(builder, arr.strides, aty.ndim)
    item = ir.Constant(ir.IntType(64), context.get_abi_sizeof(context.get_data_type(aty.dtype)))
    return [arr.data] + [builder.sdiv(s, item) for s in strides]


def _table_entry(builder, slot, kernel):
    i64 = ir.IntType(64)
    module = builder.module
    try:
        gv = module.get_global(TABLE_SYMBOL)
    except KeyError:
        gv = ir.GlobalVariable(module, i64.as_pointer(), name=TABLE_SYMBOL)
        gv.linkage = "external"
    table = builder.load(gv)
    index = builder.add(builder.mul(slot, ir.Constant(i64, N_KERNELS)), ir.Constant(i64, kernel))
    return builder.load(builder.gep(table, [index]))


def _codegen(kernel):
    """Code generation of a call to table entry ``kernel``: arrays become (pointer, strides)."""

    def codegen(context, builder, signature, args):
        i64 = ir.IntType(64)
        c_args, c_types = [], []
        for aty, value in zip(signature.args[1:], args[1:]):
            if isinstance(aty, types.Array):
                data, *strides = _array_args(context, builder, aty, value)
                pointer = context.get_data_type(aty.dtype).as_pointer()
                c_args += [builder.bitcast(data, pointer), *strides]
                c_types += [pointer] + [i64] * len(strides)
            elif isinstance(aty, types.Boolean):
                c_args.append(builder.zext(value, i64))
                c_types.append(i64)
            else:
                c_args.append(context.cast(builder, value, aty, types.int64))
                c_types.append(i64)
        fnty = ir.FunctionType(ir.VoidType(), c_types)
        slot = context.cast(builder, args[0], signature.args[0], types.int64)
        address = _table_entry(builder, slot, kernel)
        builder.call(builder.inttoptr(address, fnty.as_pointer()), c_args)
        return context.get_dummy_value()

    return codegen


@intrinsic
def _call_rhs(typingctx, slot, y, p, clamped, dydt):
    return types.void(slot, y, p, clamped, dydt), _codegen(K_RHS)


@intrinsic
def _call_jac(typingctx, slot, y, p, clamped, J):
    return types.void(slot, y, p, clamped, J), _codegen(K_JAC)


@intrinsic
def _call_split(typingctx, slot, y, p, clamped, a, b):
    return types.void(slot, y, p, clamped, a, b), _codegen(K_SPLIT)


@intrinsic
def _call_reset(typingctx, slot, y, p):
    return types.void(slot, y, p), _codegen(K_RESET)


@intrinsic
def _call_rhs_cols(typingctx, slot, Y, P, lo, hi, clamped, F):
    return types.void(slot, Y, P, lo, hi, clamped, F), _codegen(K_RHS_COLS)


@jit
def rhs(code, y, p, clamped, dydt):
    """Right-hand side of one cell of model file ``code`` into ``dydt``."""
    _call_rhs(code - FIRST_CODE, y, p, clamped, dydt)


@jit
def jac(code, y, p, clamped, J):
    """Jacobian of one cell of model file ``code`` into ``J[:n, :n]``."""
    _call_jac(code - FIRST_CODE, y, p, clamped, J)


@jit
def split(code, y, p, clamped, a, b):
    """Quasi-linear split (a_i + b_i y_i, b_i = d f_i / d y_i) of one cell of model file ``code``."""
    _call_split(code - FIRST_CODE, y, p, clamped, a, b)


@jit
def reset(code, y, p):
    """The reset of model file ``code`` applied to ``y``."""
    _call_reset(code - FIRST_CODE, y, p)


@jit
def rhs_cols(code, Y, P, lo, hi, clamped, F, k):
    """Right-hand side of cells lo..hi-1 of model file ``code`` (structure of arrays).

    As :func:`spikegauge.models.kernels.rhs_cols`: column ``i - lo`` of ``Y``
    and ``F[k]`` for cell ``i``, column ``i`` of ``P``. The generated loop
    reads consecutive cells from consecutive addresses; returns False (and
    computes nothing) when a layout does not allow that, so the caller goes
    cell by cell.
    """
    Fk = F[k]
    if Y.strides[1] != 8 or P.strides[1] != 8 or Fk.strides[1] != 8 or clamped.strides[0] != 1:
        return False
    _call_rhs_cols(code - FIRST_CODE, Y, P, lo, hi, clamped, Fk)
    return True


# Numeric helpers of generated code.

@jit
def safe_ratio(x):
    """x / (1 - exp(-x)), 1 at x = 0 (series below |x| = 1e-5, error < 1e-20)."""
    if abs(x) < 1e-5:
        return 1.0 + x * (0.5 + x / 12.0)
    return -x / math.expm1(-x)


@inline_jit
def safe_ratio_vector(x):
    """:func:`safe_ratio` for loops over cells: the vectorisable exp, both branches computed and
    one selected (the quotient is NaN at 0 and unused), so the loop stays vectorisable; within
    about 1e-11 relative of :func:`safe_ratio` (the cancellation in 1 - exp(-x) near |x| = 1e-5)."""
    q = x / (1.0 - vector_exp(-x))
    return 1.0 + x * (0.5 + x / 12.0) if abs(x) < 1e-5 else q


@jit
def safe_ratio_slope(x):
    """d/dx [x / (1 - exp(-x))], 1/2 at x = 0 (series below |x| = 1e-4, error < 1e-17)."""
    if abs(x) < 1e-4:
        return 0.5 + x / 6.0
    em = math.expm1(-x)          # e^-x - 1
    return -(em + x * (em + 1.0)) / (em * em)


@jit
def step(x):
    """Heaviside step (the derivative of max/abs), 1/2 at 0."""
    return 1.0 if x > 0.0 else (0.0 if x < 0.0 else 0.5)


@jit
def sign(x):
    """Sign of x, 0 at 0."""
    return 1.0 if x > 0.0 else (-1.0 if x < 0.0 else 0.0)


def table_snapshot() -> np.ndarray:
    """Copy of the kernel table (model slot, kernel), for tests and diagnostics."""
    return np.ctypeslib.as_array(TABLE).reshape(MAX_MODEL_FILES, N_KERNELS).copy()
