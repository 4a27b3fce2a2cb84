"""All numba options live here so cache/parallel/fastmath choices are visible in one place.

Kernels that write simulation state never use fastmath: it would let LLVM reorder float
operations differently per build and break bit-exact replays.
"""
import os

# Passive OpenMP wait: with the default active spin a busy second core stalls the other thread.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
os.environ.setdefault("NUMBA_THREADING_LAYER", "omp")

import numba  # noqa: E402
import numba.extending  # noqa: E402

# `kernel` for serial kernels and per-agent helpers, `parallel_kernel` for prange loops over agents.
kernel = numba.njit(cache=True, nogil=True, fastmath=False, error_model="numpy")
parallel_kernel = numba.njit(cache=True, nogil=True, parallel=True, fastmath=False, error_model="numpy")
# `inline_kernel` for small helpers that take an array and run once per agent: inlined where numba
# builds the caller's IR, so the call no longer pays atomic reference counting of its array arguments
# (a third of navigate_phase; with two threads both hit the same counter). Same operations, same bits.
inline_kernel = numba.njit(cache=True, nogil=True, fastmath=False, error_model="numpy", inline="always")


def set_threads(n: int) -> None:
    """Use n worker threads for parallel kernels (results do not depend on n)."""
    numba.set_num_threads(int(n))


def max_threads() -> int:
    return int(numba.config.NUMBA_NUM_THREADS)


@numba.extending.intrinsic
def prefetch(typingctx, arr, row, byte_offset):
    """Hint the CPU to fetch the cache line at byte_offset from the start of arr[row] (any array of
    one or more dimensions). A hint only: no effect on results, and no fault for any address."""
    from llvmlite import ir
    from numba.core import cgutils, types

    if not (isinstance(arr, types.Array) and arr.ndim >= 1 and isinstance(row, types.Integer)
            and isinstance(byte_offset, types.Integer)):
        return None

    def codegen(context, builder, sig, args):
        ary = context.make_array(sig.args[0])(context, builder, args[0])
        stride = builder.extract_value(ary.strides, 0)
        offset = builder.add(builder.mul(context.cast(builder, args[1], sig.args[1], types.intp), stride),
                             context.cast(builder, args[2], sig.args[2], types.intp))
        ptr = builder.gep(builder.bitcast(ary.data, ir.IntType(8).as_pointer()), [offset])
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [ptr.type, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
        builder.call(fn, [ptr, i32(0), i32(3), i32(1)])   # read, keep in all cache levels, data
        return context.get_dummy_value()

    return types.void(arr, row, byte_offset), codegen


@numba.extending.intrinsic
def fetch_add(typingctx, arr, index, value):
    """Atomically add value to arr[index] (int64) and return the old value: a shared work counter
    for threads that take the next item when done with theirs."""
    from numba.core import cgutils, types

    if not (isinstance(arr, types.Array) and arr.ndim == 1 and arr.dtype == types.int64
            and isinstance(index, types.Integer) and isinstance(value, types.Integer)):
        return None

    def codegen(context, builder, sig, args):
        ary = context.make_array(sig.args[0])(context, builder, args[0])
        idx = context.cast(builder, args[1], sig.args[1], types.intp)
        ptr = cgutils.get_item_pointer(context, builder, sig.args[0], ary, [idx])
        val = context.cast(builder, args[2], sig.args[2], types.int64)
        return builder.atomic_rmw("add", ptr, val, "monotonic")

    return types.int64(arr, index, value), codegen
