"""Two low-level helpers of the compiled loops (numba), imported only by them.

**Borrowed views.**
numba counts references to every array a compiled function holds. Each time an array is
handed to a helper inlined into a loop (a cycle's rewards, a row of transitions), the
count goes up on entry and down on exit, with atomic instructions: in the backward
induction of ``benchmarks/bench_kernels.py`` that was about an eighth of the time.

:func:`borrowed` gives views of a kernel's array arguments that carry no reference count
(a null ``meminfo``), so those increments cost nothing. The views are valid while the
arrays they come from are alive; for a kernel's own arguments that is the whole call, as
the caller holds them. Use it on arguments only, never on an array the kernel allocates
(numba frees that after its last use, leaving the view dangling), and never return a
borrowed view.

**Prefetch.** :func:`prefetch` asks the processor to bring a cache line into cache ahead
of use (the ``llvm.prefetch`` intrinsic); it changes no result. The backward induction
asks for the next draw's transitions while it computes the current draw, so that draw's
first read finds much of it in cache instead of waiting on memory.
"""

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

_FIELDS = ("nitems", "itemsize", "data", "shape", "strides")


def _borrow(context, builder, kind, value):
    # The same array with a null meminfo and parent; tuples member by member; other
    # values as they are.
    if isinstance(kind, types.Array):
        source = context.make_array(kind)(context, builder, value=value)
        view = context.make_array(kind)(context, builder)
        for field in _FIELDS:
            setattr(view, field, getattr(source, field))
        view.meminfo = cgutils.get_null_value(view.meminfo.type)
        view.parent = cgutils.get_null_value(view.parent.type)
        return view._getvalue()
    if isinstance(kind, types.BaseTuple):
        members = [
            _borrow(context, builder, member, builder.extract_value(value, i))
            for i, member in enumerate(kind)
        ]
        return context.make_tuple(builder, kind, members)
    return value


@intrinsic
def borrowed(typingctx, arrays):
    """Views of ``arrays`` (an array, or a tuple of arrays and other values, nested) that
    carry no reference count; same types, same data."""

    def codegen(context, builder, signature, args):
        return _borrow(context, builder, signature.args[0], args[0])

    return arrays(arrays), codegen


@intrinsic
def prefetch(typingctx, array, first, offset):
    """Hint: bring into cache the element ``offset`` (counted in elements, C order) of
    ``array[first]``. No effect on results; an address past the end is harmless, as a
    prefetch never faults."""

    def codegen(context, builder, signature, args):
        kind = signature.args[0]
        source = context.make_array(kind)(context, builder, value=args[0])
        strides = cgutils.unpack_tuple(builder, source.strides, kind.ndim)
        start = builder.ptrtoint(source.data, cgutils.intp_t)
        skip = builder.add(builder.mul(args[1], strides[0]), builder.mul(args[2], source.itemsize))
        byte = ir.IntType(8).as_pointer()
        address = builder.inttoptr(builder.add(start, skip), byte)
        # Opaque pointers (newer LLVM) name the intrinsic by address space only.
        name = "llvm.prefetch.p0" if getattr(byte, "is_opaque", False) else "llvm.prefetch.p0i8"
        i32 = ir.IntType(32)
        function = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(ir.VoidType(), [byte, i32, i32, i32]), name
        )
        read, keep_close, data_cache = (ir.Constant(i32, k) for k in (0, 3, 1))
        builder.call(function, [address, read, keep_close, data_cache])
        return context.get_dummy_value()

    return types.void(array, types.intp, types.intp), codegen
