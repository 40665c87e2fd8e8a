"""Compiled helpers for raw addresses and memory fences (numba intrinsics).

The callback's userdata is the address of a table of addresses; these turn an
address into a pointer that :func:`numba.carray` can view, and back, and emit
the fences that order a seqlock's and a ring's index updates against the data
they guard.
"""

from llvmlite import ir
from numba import types
from numba.extending import intrinsic


@intrinsic
def address_to_voidptr(typingctx, address):
    """``void*`` from an int64 address (``inttoptr``)."""
    sig = types.voidptr(types.int64)

    def codegen(context, builder, signature, args):
        return builder.inttoptr(args[0], context.get_value_type(types.voidptr))

    return sig, codegen


@intrinsic
def voidptr_to_address(typingctx, pointer):
    """int64 address of a ``void*`` (``ptrtoint``); NULL gives 0."""
    sig = types.int64(types.voidptr)

    def codegen(context, builder, signature, args):
        return builder.ptrtoint(args[0], ir.IntType(64))

    return sig, codegen


@intrinsic
def fence(typingctx):
    """A sequentially consistent memory fence; neither compiler nor CPU moves memory accesses across it."""
    sig = types.void()

    def codegen(context, builder, signature, args):
        builder.fence("seq_cst")
        return context.get_dummy_value()

    return sig, codegen
