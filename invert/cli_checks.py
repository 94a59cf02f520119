"""Checks of the command line's options and paths, made before anything is read or run.

Used by :mod:`invert.cli`: argparse types that name their option (:func:`int_at_least`,
:func:`finite`), the ``--scheduler`` check, the batch pre-checks, the exit-2 rule for a log
none of whose frames could be used, and :func:`one_line` (an error's one printed line).
"""

from __future__ import annotations

import argparse
import contextlib
from pathlib import Path

import numpy as np

from ._validation import check_level
from .errors import InputError

__all__ = ["int_at_least", "finite", "SEED", "SCHEDULER_TIMEOUT", "check_scheduler",
           "check_batch_args", "no_work_left_on_bad_input", "refuse_all_rejected", "one_line",
           "shape_options", "SHAPE_OPTIONS"]

#: Command-line options that give a domain's shape parameters (``shape_parameters`` of the
#: domain class), by parameter name.
SHAPE_OPTIONS = {"inner_radius": "--inner-radius"}


def shape_options(domain_cls, name, radius, **given):
    """Shape parameters for ``domain_cls`` from the options given (None: not given).

    Each parameter the class declares (``shape_parameters``) must be given and each one given
    must be declared; an inner radius must lie below ``radius``. Raises ``ValueError`` with
    one line naming the option.
    """
    declared = tuple(getattr(domain_cls, "shape_parameters", ()))
    given = {k: v for k, v in given.items() if v is not None}
    for key in given:
        if key not in declared:
            raise ValueError(f"{SHAPE_OPTIONS[key]} does not apply to --domain {name}")
    for key in declared:
        if key not in given:
            raise ValueError(f"--domain {name} needs {SHAPE_OPTIONS[key]}")
    inner = given.get("inner_radius")
    if inner is not None and not inner < radius:
        raise ValueError(f"--inner-radius must be below --radius {radius:g} (0 < A < B), got "
                         f"{inner:g}")
    return given


def int_at_least(name, low):
    """Argparse type: an integer >= ``low``, the message naming the option."""
    def conv(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be an integer, got {text!r}") from None
        if v < low:
            raise argparse.ArgumentTypeError(f"{name} must be >= {low}, got {text!r}")
        return v

    return conv


def finite(name, low=None):
    """Argparse type: a finite number (no nan or inf), ``>= low`` when given, naming the option."""
    def conv(text):
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a number, got {text!r}") from None
        if not np.isfinite(v):
            raise argparse.ArgumentTypeError(f"{name} must be a finite number, got {text!r}")
        if low is not None and v < low:
            raise argparse.ArgumentTypeError(f"{name} must be >= {low:g}, got {text!r}")
        return v

    return conv


#: Seeds are what numpy.random.default_rng takes: non-negative integers, for every method.
SEED = int_at_least("--seed", 0)


#: Seconds to wait for a --scheduler to answer (dask's own default is 30 s).
SCHEDULER_TIMEOUT = 5.0
#: Address schemes a dask client can connect to from another process.
_SCHEMES = ("tcp", "tls", "ws", "wss", "ucx")


def check_scheduler(address, engine="dask", timeout=SCHEDULER_TIMEOUT):
    """Check a ``--scheduler`` address before the run: well formed, secured, reachable.

    Raises
    ------
    ValueError
        One line naming the address: with another engine than dask, a malformed address or
        unknown scheme, ``tls://``/``wss://`` without certificates in the dask configuration
        (``distributed.comm.tls.client.cert``), or nothing answering within ``timeout`` s.
    """
    if address is None:
        return
    if engine != "dask":
        raise ValueError(f"--scheduler {address!r} belongs to --engine dask")
    import socket

    import dask
    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        scheme, loc = parse_address(address)
        host, port = parse_host_port(loc)
    except ValueError as exc:
        raise ValueError(f"--scheduler {address!r} is not an address like "
                         f"tcp://HOST:PORT ({exc})") from None
    if scheme not in _SCHEMES:
        raise ValueError(f"--scheduler {address!r}: unknown scheme {scheme!r} (one of "
                         f"{', '.join(_SCHEMES)})")
    if scheme in ("tls", "wss") and not dask.config.get("distributed.comm.tls.client.cert",
                                                        None):
        raise ValueError(f"--scheduler {address!r} needs TLS certificates, and none are set "
                         f"(dask configuration distributed.comm.tls.client.cert/key, "
                         f"ca-file)")
    try:
        socket.create_connection((host, port), timeout=timeout).close()
    except OSError as exc:
        raise ValueError(f"--scheduler {address!r}: no scheduler answers there within "
                         f"{timeout:g} s ({exc.strerror or exc.__class__.__name__})") from None
    _handshake(address, timeout)


def _handshake(address, timeout):
    """Ask the address who it is (dask's ``identity``), the whole exchange within ``timeout``.

    Something that listens but is no scheduler would otherwise hold the run until the peer
    gives up (a dask client's own timeout does not bound the handshake).
    """
    import asyncio

    from distributed.comm import connect

    async def identity():
        comm = await connect(address, timeout=timeout)
        try:
            await comm.write({"op": "identity", "reply": True})
            return await comm.read()
        finally:
            comm.abort()

    try:
        info = asyncio.run(asyncio.wait_for(identity(), timeout))
    except Exception as exc:  # any failure to talk to it: no scheduler there
        why = one_line(exc) if str(exc).strip() else exc.__class__.__name__
        raise ValueError(f"--scheduler {address!r}: no dask scheduler answered there within "
                         f"{timeout:g} s ({why})") from None
    if not isinstance(info, dict) or info.get("type") != "Scheduler":
        what = info.get("type") if isinstance(info, dict) else info
        raise ValueError(f"--scheduler {address!r}: the process there is not a dask scheduler "
                         f"(it says it is {what!r})")


def check_batch_args(args):
    """Refuse batch options that contradict each other, before anything is read or run."""
    from .io.publish import check_output_path

    if args.calibrate and args.lam is not None:
        raise ValueError("--calibrate and --lam exclude each other")
    check_level(args.level, "level", "batch")
    check_health_args(args)
    from .io.sql import is_database_url

    if not is_database_url(args.log) and Path(args.log).is_dir():
        raise InputError(str(args.log), "is a folder, not a log file (give LOG.csv or "
                         "LOG.parquet)")
    if not args.resume:
        check_output_path(args.out, "batch")
    check_scheduler(args.scheduler, args.engine)


def check_health_args(args):
    """Refuse sensor-health options that do not fit the run.

    Options of the health model without --sensor-health, and --sensor-health without the
    exact assimilation, are refused; ``--health-block`` is read (a ValueError naming it).
    """
    own = [o for o, v in (("--offset-sd", args.offset_sd), ("--offset-rate", args.offset_rate),
                          ("--health-block", args.health_block)) if v is not None]
    if own and not args.sensor_health:
        raise ValueError(f"{', '.join(own)} belong(s) to --sensor-health")
    if not args.sensor_health:
        return
    if not args.assimilate or args.max_transient:
        raise ValueError("--sensor-health needs --assimilate with the exact filter "
                         "(--max-transient 0)")
    if args.health_block is not None:
        from .batch.health_chain import parse_block

        parse_block(args.health_block)


@contextlib.contextmanager
def no_work_left_on_bad_input(args, fresh):
    """On bad input, remove the working folder the run made (a resumed run keeps its own)."""
    try:
        yield
    except ValueError:
        if not args.resume:
            from .batch.checkpoint import WORK_DIR
            from .io.publish import discard_work

            discard_work(args.out, WORK_DIR, fresh=fresh)
        raise


def refuse_all_rejected(args, summary):
    """Refuse a log none of whose frames could be used: bad input (exit 2), not a result."""
    f = summary["frames"]
    if f["total"] and f.get("rejected", 0) == f["total"]:
        reasons = summary.get("rejections") or {}
        top = max(reasons, key=reasons.get) if reasons else "see frames"
        raise InputError(str(args.log), f"all {f['total']} frames were rejected (most often: "
                         f"{top}); the frames table in {args.out}/ lists each reason")


def one_line(exc):
    """Return the first non-blank line of a message (the class name when it has none)."""
    # lines without a letter or digit (a parser's "^" marker) say nothing on their own
    lines = [ln.strip() for ln in str(exc).splitlines() if any(c.isalnum() for c in ln)]
    return lines[0] if lines else f"{exc.__class__.__name__} (no message)"
