"""Read ahead: a batch run's reading and format stage in a process of its own.

Stage: **sources** (batch) → formats. A batch run (``fit``, ``score``, ``templates``) spends a
third to two thirds of its time reading and parsing lines, work that needs nothing from the
stages after it. :func:`read_ahead` runs a generator of such work in a child process forked for
the run's files, up to ``AHEAD`` items ahead of the caller, so the parsing of the next blocks
overlaps the mining, sessions and scoring of this one on a second core. The child is a fork of
the caller: it runs the caller's own objects (its pipeline's formats), so both processes run one
code path, and the items come back through a pipe as JSON (orjson: plain data, never anything a
reader could be made to run, unlike pickle); the bounded queue they wait in on the caller's side
is what bounds the memory in between.

Where ``os.fork`` is missing (or not safe: only Linux is trusted here) the generator simply
runs in the caller's process; the items are the same either way (``tests/test_ahead.py``).
An error in the child reaches the caller as the same exception (a tracewatch error keeps its
one-line message); a child that dies without a word is reported as an internal error; a caller
that stops early kills its child, and a caller killed outright takes it along (Linux's
parent-death signal).
"""

from __future__ import annotations

import ctypes
import gc
import os
import queue
import signal
import sys
import threading
import traceback
from collections.abc import Callable, Iterator
from multiprocessing.connection import Connection
from typing import TypeVar

import orjson

from .. import errors
from ..errors import TracewatchError

T = TypeVar("T")

# fork is used on Linux only: elsewhere (macOS) forking a process with system libraries loaded
# is not safe, and a spawned child would start over without the caller's objects
CAN_FORK = hasattr(os, "fork") and sys.platform.startswith("linux")

# what a message on the pipe is: its first byte
_ITEM, _END, _ERROR = b"i", b"e", b"x"
_PR_SET_PDEATHSIG = 1  # linux/prctl.h
AHEAD = 8  # items the child may have sent that the caller has not taken yet (each one block)


class ReaderDied(RuntimeError):
    """The child process reading ahead failed outside tracewatch's own errors."""


def read_ahead(produce: Callable[[], Iterator[T]], encode: Callable[[T], bytes] = orjson.dumps,
               decode: Callable[[bytes], T] = orjson.loads, *, in_child: bool = CAN_FORK) -> Iterator[T]:
    """The items of ``produce()``, computed in a forked child process (``in_child``) and handed
    over as ``decode(encode(item))`` (JSON by default), or computed here and handed over as
    they are."""
    if not in_child:
        yield from produce()
        return
    sys.stdout.flush()  # nothing buffered is written twice (the child never flushes: os._exit)
    sys.stderr.flush()
    read_fd, write_fd = os.pipe()
    _widen(write_fd)
    parent = os.getpid()
    # Ctrl-C is held back across the fork: the child must never take one (it is the caller's
    # to handle, and ends the child), the caller takes it once its clean-up below is in place
    mask = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    pid = os.fork()
    if pid == 0:  # the child: produce, send, and leave without running the caller's clean-up
        try:
            signal.signal(signal.SIGINT, signal.SIG_IGN)
            signal.pthread_sigmask(signal.SIG_SETMASK, mask)
            os.close(read_fd)
            _die_with(parent)
            gc.freeze()  # the caller's objects are never scanned here, so their pages stay shared
            _produce(produce, encode, Connection(write_fd, readable=False))
        finally:
            os._exit(1)  # (_produce leaves by os._exit itself)
    conn, pump = Connection(read_fd, writable=False), None
    try:
        os.close(write_fd)
        signal.pthread_sigmask(signal.SIG_SETMASK, mask)
        # a thread takes the items off the pipe as they come (reading releases the GIL), so the
        # child runs up to AHEAD items ahead rather than one pipe buffer
        waiting: queue.Queue[bytes | None] = queue.Queue(AHEAD)
        pump = threading.Thread(target=_pump, args=(conn, waiting), name="tracewatch-read-ahead", daemon=True)
        pump.start()
        while True:
            data = waiting.get()
            if data is None:
                raise ReaderDied("the reading process ended without a word")
            kind = data[:1]
            if kind == _END:
                return
            if kind == _ERROR:
                raise _error(*orjson.loads(memoryview(data)[1:]))
            yield decode(memoryview(data)[1:])
    finally:
        try:
            os.kill(pid, signal.SIGKILL)  # done or given up: it holds nothing worth finishing
        except ProcessLookupError:
            pass
        os.waitpid(pid, 0)
        while pump is not None and pump.is_alive():  # it ends at the end of the pipe: room for its last item
            try:
                waiting.get(timeout=0.05)
            except queue.Empty:
                pass
        conn.close()


def _pump(conn: Connection, waiting: queue.Queue) -> None:
    try:
        while True:
            waiting.put(conn.recv_bytes())
    except (EOFError, OSError):
        waiting.put(None)


def _die_with(parent: int) -> None:
    """Ask Linux to kill this child when its parent dies (``prctl(PR_SET_PDEATHSIG)``,
    prctl(2)): a parent killed outright must not leave a reader behind, even one waiting on an
    input that stays quiet (a pipe), which would never find out by writing."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL)
    except (OSError, AttributeError):
        return  # without it, the reader still ends at its next write to the closed pipe
    if os.getppid() != parent:  # the parent died before the request took hold
        os._exit(1)


def _widen(fd: int) -> None:
    """A pipe buffer of the largest size allowed (1 MiB by default, against 64 KiB): a block's
    items cross in a few writes instead of one wake-up of each side per 64 KiB."""
    try:
        import fcntl  # Unix only, as fork is

        with open("/proc/sys/fs/pipe-max-size") as fh:
            fcntl.fcntl(fd, fcntl.F_SETPIPE_SZ, int(fh.read()))
    except (ImportError, OSError, ValueError, AttributeError):
        pass  # the default buffer works, only with more wake-ups


def _produce(produce: Callable[[], Iterator], encode: Callable[[object], bytes], conn: Connection) -> None:
    code = 0
    try:
        for item in produce():
            conn.send_bytes(_ITEM + encode(item))
        conn.send_bytes(_END)
    except BrokenPipeError:  # the caller stopped reading
        code = 1
    except BaseException as exc:  # noqa: BLE001 - every failure is handed to the caller
        code = 1
        # a tracewatch error by its class and message (the user's answer), anything else with
        # the child's traceback, which the caller's own would not show
        sent = ([type(exc).__name__, str(exc)] if isinstance(exc, TracewatchError)
                else [ReaderDied.__name__, "".join(traceback.format_exception(exc))])
        try:
            conn.send_bytes(_ERROR + orjson.dumps(sent))
        except Exception:  # noqa: BLE001 - the caller sees the pipe close
            pass
    finally:
        os._exit(code)


def _error(name: str, message: str) -> Exception:
    """The caller's copy of an error the child met: the tracewatch error of that class, with
    its message (only names of tracewatch's own errors are taken), or :class:`ReaderDied`."""
    cls = getattr(errors, name, None)
    if not (isinstance(cls, type) and issubclass(cls, TracewatchError)):
        return ReaderDied(message)
    exc = cls.__new__(cls)
    exc.args = (message,)
    return exc
