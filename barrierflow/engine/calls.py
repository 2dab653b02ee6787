"""A compiled kernel calling another through its address, so that it compiles without it.

When a numba kernel calls another (``f(...)`` inside ``@njit`` code), numba links the callee's
whole code library into the caller's and LLVM optimises and emits the linked code again: a
kernel around a run loop (a population kernel around ``chain_schedule`` or ``run_marks``)
spends nearly all of its first compile on the loop it calls, which the single runs have already
compiled. :func:`caller_of` gives a call that does not link: the caller takes the callee's
entry, ``(address, key)`` from :func:`entry`, as an argument and calls the callee's compiled
code through that address, with numba's own calling convention (errors the callee raises reach
the caller as from a direct call). One compiled loop then serves both the single runs and the
kernels that call it, and the caller's compile is that of its own body.

The address is that of the callee's compiled form for the argument types of the call, looked up
in the process that calls (numba's cache keeps compiled code, not addresses). ``key`` names
those types and the return type; the caller checks it against the types it was compiled for
and raises a RuntimeError when they differ, rather than calling code of another layout. So the
Python side builds the callee's arguments as the caller will (the same kinds of values: an
``np.int64`` counter, C-contiguous arrays, the same named tuples), which :func:`entry` types.

Each call site is written with the callee's arguments as the single run passes them, so the
callee is compiled once, for the types of the single run, and the caller's own compile does not
grow with it.
"""

from __future__ import annotations

import hashlib

import numba
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.core.imputils import impl_ret_borrowed
from numba.extending import intrinsic

__all__ = ["caller_of", "entry", "plain"]


def _overload(dispatcher, argtypes: tuple):
    """The callee's compiled form for ``argtypes`` (compiled now, or loaded from numba's cache)."""
    argtypes = tuple(types.unliteral(t) for t in argtypes)
    dispatcher.compile(argtypes)
    return argtypes, dispatcher.overloads[argtypes]


def _key(dispatcher, argtypes: tuple, restype) -> int:
    """A 63-bit number naming the callee and the types of its arguments and result."""
    text = f"{dispatcher.py_func.__module__}.{dispatcher.py_func.__qualname__}{argtypes}->{restype}"
    return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "little") >> 1


def entry(dispatcher, *args) -> tuple[int, int]:
    """The entry of ``dispatcher``'s compiled form for the types of ``args``: ``(address, key)``.

    Parameters
    ----------
    dispatcher : numba dispatcher
        The callee (``@njit``).
    *args
        Values of the types the caller passes (their values are not used).

    Returns
    -------
    tuple of (int, int)
        The address of the compiled function and the key of its types, for a call made by
        :func:`caller_of`. Valid in this process only.
    """
    if numba.config.DISABLE_JIT:  # the kernels run as Python (NUMBA_DISABLE_JIT=1): a plain call
        return 0, 0
    argtypes, cres = _overload(dispatcher, tuple(numba.typeof(a) for a in args))
    address = cres.library.get_pointer_to_function(cres.fndesc.llvm_func_name)
    if not address:
        raise RuntimeError(f"no compiled code of {dispatcher.py_func.__qualname__} for {argtypes}")
    return address, _key(dispatcher, argtypes, cres.signature.return_type)


def caller_of(dispatcher):
    """A function for compiled code: ``call(entry, *args)`` runs ``dispatcher(*args)`` through the
    address in ``entry`` (see :func:`entry`) and returns its result, without linking the callee's
    code into the caller.

    Raises (in compiled code) RuntimeError when ``entry`` is of a compiled form for other types.
    With ``NUMBA_DISABLE_JIT=1`` (the kernels run as Python) it is a plain call.
    """
    if numba.config.DISABLE_JIT:  # ``dispatcher`` is the Python function itself
        return lambda _entry, *args: dispatcher(*args)
    name = dispatcher.py_func.__qualname__

    @intrinsic
    def call(typingctx, ent, *args):
        if not (isinstance(ent, types.UniTuple) and ent.count == 2 and ent.dtype == types.int64):
            return None  # not an entry: numba reports the call's types
        argtypes, cres = _overload(dispatcher, args)
        restype = cres.signature.return_type
        key = _key(dispatcher, argtypes, restype)
        sig = restype(ent, types.StarArgTuple(args))

        def codegen(context, builder, signature, llargs):
            packed, tup = llargs
            values = cgutils.unpack_tuple(builder, tup, len(argtypes))
            other = builder.icmp_unsigned("!=", builder.extract_value(packed, 1), ir.Constant(ir.IntType(64), key))
            with cgutils.if_unlikely(builder, other):
                context.call_conv.return_user_exc(
                    builder, RuntimeError, (f"the entry given for {name} is of a compiled form for other argument "
                                            "types than this call's",))
            fnty = context.call_conv.get_function_type(restype, argtypes)
            fn = builder.inttoptr(builder.extract_value(packed, 0), fnty.as_pointer())
            status, result = context.call_conv.call_function(builder, fn, restype, argtypes, values)
            with cgutils.if_unlikely(builder, status.is_error):
                context.call_conv.return_status_propagate(builder, status)
            return result

        return sig, codegen

    return call


@intrinsic
def _plain(typingctx, named):
    if not isinstance(named, types.BaseNamedTuple):
        return None
    tuple_type = types.BaseTuple.from_types(named.types)

    def codegen(context, builder, signature, llargs):
        values = cgutils.unpack_tuple(builder, llargs[0], len(named.types))
        return impl_ret_borrowed(context, builder, tuple_type, context.make_tuple(builder, tuple_type, values))

    return tuple_type(named), codegen


def _plain_python(named: tuple) -> tuple:
    return tuple(named)


plain = _plain_python if numba.config.DISABLE_JIT else _plain
"""``plain(m)``: a named tuple as the plain tuple of its values, in compiled code (what ``tuple(m)``
gives in Python), for a callee that takes the plain form; a plain ``tuple`` when the kernels run
as Python (``NUMBA_DISABLE_JIT=1``)."""
