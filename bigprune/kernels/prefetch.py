"""A cache prefetch hint for numba kernels that gather rows at random."""
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic

_I8P = ir.IntType(8).as_pointer()
_PREFETCH = "llvm.prefetch.p0" if str(_I8P) == "ptr" else "llvm.prefetch.p0i8"


@intrinsic
def prefetch(typingctx, array, row, col):
    """Hint the CPU to fetch ``array[row, col]`` into cache for reading; no effect on results."""

    def codegen(context, builder, signature, args):
        array_type = signature.args[0]
        view = context.make_array(array_type)(context, builder, args[0])
        at = [context.cast(builder, value, kind, types.intp)
              for value, kind in zip(args[1:], signature.args[1:])]
        pointer = cgutils.get_item_pointer(context, builder, array_type, view, at, wraparound=False)
        hint = ir.FunctionType(ir.VoidType(), [_I8P] + [ir.IntType(32)] * 3)
        function = cgutils.get_or_insert_function(builder.module, hint, _PREFETCH)
        # read access, highest temporal locality, data cache
        flags = [ir.Constant(ir.IntType(32), v) for v in (0, 3, 1)]
        builder.call(function, [builder.bitcast(pointer, _I8P)] + flags)
        return context.get_dummy_value()

    return types.void(array, row, col), codegen


@njit(inline="always")
def prefetch_row(x, row):
    """Hint the CPU to fetch every cache line of ``x[row]`` (x : 2-D C-contiguous)."""
    line = max(1, 64 // x.itemsize)  # elements per 64-byte cache line
    d = x.shape[1]
    for k in range(0, d, line):
        prefetch(x, row, k)
    prefetch(x, row, d - 1)  # the row's last line when rows are not aligned
