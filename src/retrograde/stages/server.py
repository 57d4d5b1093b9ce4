"""A stage server: the run's stage commands start as forks of one warm process.

DVC runs every stage as its own command, so each ``python -m retrograde.stages.<stage>``
pays for a fresh interpreter and its imports (numpy, the package, and for an ``mlp`` fit
scikit-learn and scipy: about 1.5 CPU-s) before a fit that may take a tenth of that. While
``retrograde run`` (or ``plan --run``) works, it starts this server; the stage command,
finding :data:`SERVER_ENV` in its environment, is a thin client (:func:`delegate`): it hands
its arguments, working folder, environment and its standard input, output and error (the
descriptors themselves) to the server, which forks a child that has everything imported
already. The child runs the stage's ``main`` exactly as the command would, writing to the
command's own output, and the client exits with the child's status. DVC sees the same
command, the same outputs and the same exit status.

Safety:

- a client killed while its stage runs (DVC interrupted) closes its connection; the child
  notices, interrupts itself as Ctrl-C would (so a trainer's process group is killed as
  usual) and is killed if still there 10 s later: no stage keeps writing after its
  command is gone;
- the server exits when the process that started it ends (its standard input closes);
- when there is no server, it cannot be reached, or ``RETROGRADE_STAGE_SERVER`` is empty,
  the command runs the stage itself (plain ``dvc repro`` works as always); so it does,
  from the start, when the served stage ends without a status (its process died);
- heavy modules a family needs (``Family.warm_imports``) are imported by the server at its
  first fit, never for a run with nothing to fit.

Only where ``fork`` and Unix sockets exist (Linux, macOS); elsewhere stages run as before.
This module imports only the standard library at the top: it is the client too.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import struct
import sys
import tempfile
from collections.abc import Iterator, Sequence
from pathlib import Path

__all__ = ["SERVER_ENV", "available", "delegate", "serve", "stage_server"]

#: the environment variable holding the server's socket path (empty or unset: no server)
SERVER_ENV = "RETROGRADE_STAGE_SERVER"
#: the stage modules a client may ask for
STAGES = ("units", "reorder", "fit", "table")
#: seconds a stage whose command was killed gets to clean up before it is killed too
_GRACE_SECONDS = 10.0
_HEADER = struct.Struct("!I")
_STATUS = struct.Struct("!i")


def available() -> bool:
    """Whether this platform can run a stage server (``fork`` and Unix sockets)."""
    return hasattr(os, "fork") and hasattr(socket, "AF_UNIX") and hasattr(socket, "send_fds")


# ---------------------------------------------------------------------------- client
def delegate(stage: str) -> None:
    """Run this stage command in the server and exit with its status; return (so the
    command runs the stage itself) when no server is reachable."""
    path = os.environ.get(SERVER_ENV)
    if not path or not available():
        return
    client = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        client.connect(path)
    except OSError:
        client.close()
        return  # no server (it ended, or this is a plain `dvc repro`): run here
    request = json.dumps(
        {"stage": stage, "argv": sys.argv[1:], "cwd": os.getcwd(), "env": dict(os.environ)}
    ).encode()
    try:
        socket.send_fds(client, [_HEADER.pack(len(request)) + request], [0, 1, 2])
        reply = _recv_exactly(client, _STATUS.size)
    except OSError:
        reply = b""
    if len(reply) != _STATUS.size:
        # The served stage ended without a status (its process died). Closing the
        # connection stops it if it is still there (its watchdog); the stage then runs
        # here, from the start: every output it writes is replaced whole, and DVC records
        # only what this command's exit status says.
        client.close()
        print(
            f"retrograde {stage}: the stage server gave no result; running the stage here",
            file=sys.stderr,
        )
        return
    os._exit(_STATUS.unpack(reply)[0])


def _recv_exactly(sock: socket.socket, size: int) -> bytes:
    data = b""
    while len(data) < size:
        chunk = sock.recv(size - len(data))
        if not chunk:
            break
        data += chunk
    return data


# ---------------------------------------------------------------------------- server
def serve(path: str, warm: Sequence[str] = ()) -> None:
    """Accept stage requests on the Unix socket ``path`` until standard input closes.

    ``warm`` names modules to import before the first fit is forked (the heavy imports of
    the run's families).
    """
    import select
    import signal

    listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    listener.bind(path)
    listener.listen(64)
    print("ready", flush=True)  # the run waits for this line before starting DVC
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    os.close(devnull)
    children: set[int] = set()
    warmed: set[str] = set()
    lifeline = sys.stdin.fileno()
    try:
        while True:
            ready, _, _ = select.select([listener, lifeline], [], [], 1.0)
            _reap(children)
            if lifeline in ready and not os.read(lifeline, 4096):
                break  # the run that started us ended
            if listener not in ready:
                continue
            conn, _ = listener.accept()
            try:
                request, fds = _read_request(conn)
            except (OSError, ValueError):
                conn.close()
                continue
            _warm_up(str(request["stage"]), warm, warmed)
            pid = os.fork()
            if pid == 0:  # the child: becomes the stage command
                listener.close()
                _run_child(conn, fds, request, signal)
            children.add(pid)
            conn.close()
            for fd in fds:
                os.close(fd)
    finally:
        listener.close()
        with contextlib.suppress(OSError):
            os.unlink(path)
        for pid in children:  # normally none: every stage has ended with its command
            with contextlib.suppress(OSError):
                os.kill(pid, signal.SIGKILL)
        for pid in children:
            with contextlib.suppress(ChildProcessError):
                os.waitpid(pid, 0)


def _reap(children: set[int]) -> None:
    for pid in list(children):
        with contextlib.suppress(ChildProcessError):
            done, status = os.waitpid(pid, os.WNOHANG)
            if done == 0:
                continue
            if os.WIFSIGNALED(status):  # a stage that died, not one that failed: say so
                print(
                    f"retrograde: stage server: stage process {pid} died by signal "
                    f"{os.WTERMSIG(status)}",
                    file=sys.stderr,
                    flush=True,
                )
        children.discard(pid)


def _read_request(conn: socket.socket) -> tuple[dict[str, object], list[int]]:
    message, fds, _, _ = socket.recv_fds(conn, 1 << 16, 3)
    if len(fds) != 3 or len(message) < _HEADER.size:
        for fd in fds:
            os.close(fd)
        raise ValueError("incomplete request")
    size = _HEADER.unpack(message[: _HEADER.size])[0]
    body = message[_HEADER.size :]
    if len(body) < size:
        body += _recv_exactly(conn, size - len(body))
    request = json.loads(body)
    if request.get("stage") not in STAGES:
        for fd in fds:
            os.close(fd)
        raise ValueError("unknown stage")
    return request, list(fds)


def _warm_up(stage: str, warm: Sequence[str], warmed: set[str]) -> None:
    """Import the stage's module (and, for a fit, the families' heavy modules) once, in
    the server, so that every child forked afterwards has them."""
    import importlib

    wanted = [f"retrograde.stages.{stage}", *(warm if stage == "fit" else ())]
    for name in wanted:
        if name not in warmed:
            warmed.add(name)
            with contextlib.suppress(ImportError):  # the stage reports it, if it matters
                importlib.import_module(name)


def _run_child(conn: socket.socket, fds: list[int], request: dict[str, object], signal) -> None:  # type: ignore[no-untyped-def]
    """In the forked child: take over the client's descriptors, folder and environment,
    run the stage's ``main`` and send its exit status. Never returns."""
    import importlib
    import threading
    import time
    import traceback

    status = 1
    done = threading.Event()
    try:
        for sig in (signal.SIGTERM, signal.SIGCHLD):
            signal.signal(sig, signal.SIG_DFL)
        signal.signal(signal.SIGPIPE, signal.SIG_IGN)  # as Python sets it at start-up
        # as in a fresh interpreter: Ctrl-C is KeyboardInterrupt, so cleanups run
        signal.signal(signal.SIGINT, signal.default_int_handler)
        for target, fd in zip((0, 1, 2), fds, strict=True):
            os.dup2(fd, target)
            os.close(fd)
        os.chdir(str(request["cwd"]))
        env = request["env"]
        assert isinstance(env, dict)
        os.environ.clear()
        os.environ.update({str(k): str(v) for k, v in env.items()})

        def watch() -> None:  # the client never sends again: EOF means it is gone
            with contextlib.suppress(OSError):
                conn.recv(1)
            if done.is_set():  # the status was sent; the client is gone because it ended
                return
            # Interrupt the stage as Ctrl-C would (its cleanups run: a trainer's process
            # group is killed), and kill it if it is still there after a grace period.
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(_GRACE_SECONDS)
            os.kill(os.getpid(), signal.SIGKILL)

        threading.Thread(target=watch, daemon=True).start()
        module = importlib.import_module(f"retrograde.stages.{request['stage']}")
        argv = request["argv"]
        assert isinstance(argv, list)
        sys.argv = [f"-m retrograde.stages.{request['stage']}", *map(str, argv)]
        try:
            status = int(module.main([str(a) for a in argv]) or 0)
        except SystemExit as exc:  # argparse and friends
            code = exc.code
            status = code if isinstance(code, int) else (0 if code is None else 1)
            if isinstance(code, str):
                print(code, file=sys.stderr)
    except BaseException:  # noqa: BLE001 (the child must always answer)
        traceback.print_exc()
        status = 1
    finally:
        with contextlib.suppress(Exception):
            sys.stdout.flush()
            sys.stderr.flush()
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # the stage is over: nothing to stop
        done.set()
        with contextlib.suppress(OSError):
            conn.sendall(_STATUS.pack(status))
        os._exit(0)


# ---------------------------------------------------------------------------- host side
@contextlib.contextmanager
def stage_server(warm: Sequence[str] = ()) -> Iterator[None]:
    """Run a stage server while the body runs (the stage commands it starts find it in
    :data:`SERVER_ENV`); without one when the platform cannot, or when the variable is
    set to an empty string (``RETROGRADE_STAGE_SERVER= retrograde run`` turns it off)."""
    import subprocess

    if not available() or os.environ.get(SERVER_ENV) == "":
        yield
        return
    folder = tempfile.mkdtemp(prefix="retrograde-")
    path = os.path.join(folder, "stages.sock")
    argv = [sys.executable, "-m", "retrograde.stages.server", path, *warm]
    process = subprocess.Popen(
        argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE, close_fds=True, text=True
    )
    assert process.stdout is not None
    ready = process.stdout.readline().strip() == "ready"  # EOF if it failed: no server
    process.stdout.close()
    saved = os.environ.get(SERVER_ENV)
    if ready:
        os.environ[SERVER_ENV] = path
    try:
        yield
    finally:
        if saved is None:
            os.environ.pop(SERVER_ENV, None)
        else:
            os.environ[SERVER_ENV] = saved
        assert process.stdin is not None
        process.stdin.close()  # the lifeline: the server ends
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
        with contextlib.suppress(OSError):
            os.unlink(path)
        with contextlib.suppress(OSError):
            Path(folder).rmdir()


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m retrograde.stages.server SOCKET [MODULE ...]`` (started by the run)."""
    args = list(sys.argv[1:] if argv is None else argv)
    if not args:
        print("usage: python -m retrograde.stages.server SOCKET [MODULE ...]", file=sys.stderr)
        return 2
    serve(args[0], args[1:])
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
