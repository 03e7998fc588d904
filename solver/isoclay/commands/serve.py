"""`isoclay serve`: run the solver service (ZeroMQ) for the Blender add-on or headless clients."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

DESCRIPTION = """Run the isoclay solver service.

By default it listens on 127.0.0.1 on a free port and writes a connection file (endpoint and
signing key, mode 0600 in a 0700 directory) that the Blender add-on reads.

CAUTION: a solver reachable over a network runs jobs and returns meshes for anyone who can
talk to it. isoclay refuses to listen beyond loopback unless CURVE encryption with an
allow-list of client public keys is configured (--curve-secret and --allow-keys). Create key
pairs with --new-key NAME; give each artist a connection file holding the server's public key
and that artist's own key pair; keep *.key_secret files private (they are written 0600).
"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--endpoint", default=None,
                        help="where to listen (default tcp://127.0.0.1 on a free port; non-loopback needs CURVE)")
    parser.add_argument("--connection-file", type=Path, default=None,
                        help="connection file to write (default: $XDG_RUNTIME_DIR/isoclay/solver.json or "
                             "~/.isoclay/run/solver.json); an existing one's key and port are reused")
    parser.add_argument("--data-dir", type=Path, default=None,
                        help="edit history, uploaded meshes and field cache (default ~/.local/share/isoclay)")
    parser.add_argument("--curve-secret", type=Path, default=None, help="the server's CURVE key file (NAME.key_secret)")
    parser.add_argument("--allow-keys", type=Path, default=None, help="directory of allowed client public keys (*.key)")
    parser.add_argument("--new-key", metavar="NAME", default=None,
                        help="create NAME.key and NAME.key_secret in --keys-dir and exit")
    parser.add_argument("--keys-dir", type=Path, default=Path("isoclay-keys"), help="where --new-key writes")
    parser.add_argument("--workers", type=int, default=1, help="jobs running at once (default 1)")
    parser.add_argument("--queue", type=int, default=16, help="jobs waiting at most (default 16)")
    parser.add_argument("--memory-limit", type=float, default=8.0, help="GiB of address space per job (default 8)")
    parser.add_argument("--time-limit", type=float, default=3600.0, help="seconds per job (default 3600)")
    parser.add_argument("--cache-size", type=float, default=2.0, help="GiB of fitted fields kept (default 2)")
    parser.add_argument("--job-threads", type=int, default=None, help="torch threads per job (default: free cores)")
    parser.add_argument("--watch-stdin", action="store_true",
                        help="stop cleanly when standard input closes (for a parent such as Blender)")
    parser.add_argument("--test-params", action="store_true", help=argparse.SUPPRESS)


def add_parser(subparsers):
    parser = subparsers.add_parser("serve", help="run the solver service for the Blender add-on",
                                   description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    add_arguments(parser)
    parser.set_defaults(needs_torch=False)  # the server process never imports torch; workers do
    return parser


def run(args, ui) -> int:
    from ..errors import InvalidInput
    from ..service import auth
    from ..service.jobs import JobLimits
    from ..service.server import ServerConfig, default_data_dir, run_server

    if args.new_key:
        pub, sec = auth.create_keypair(args.keys_dir, args.new_key)
        _say(ui, f"wrote {pub} (public: put it in the server's --allow-keys directory) and {sec} (secret, 0600)")
        return 0
    _reexec_without_torch()
    for name in ("workers", "queue"):
        if getattr(args, name) < 1:
            raise InvalidInput(f"--{name} must be at least 1, got {getattr(args, name)}")
    for name in ("memory_limit", "time_limit", "cache_size"):
        if not getattr(args, name) > 0:
            raise InvalidInput(f"--{name.replace('_', '-')} must be positive, got {getattr(args, name)}")
    limits = JobLimits(max_queue=args.queue, max_workers=args.workers, memory_bytes=int(args.memory_limit * 2**30),
                       time_s=args.time_limit, cache_max_bytes=int(args.cache_size * 2**30), threads=args.job_threads,
                       test_params=args.test_params)
    config = ServerConfig(data_dir=args.data_dir or default_data_dir(), endpoint=args.endpoint,
                          connection_file=args.connection_file or auth.default_run_dir() / "solver.json",
                          curve_secret=args.curve_secret, allow_keys=args.allow_keys, limits=limits)

    def ready(server):
        _say(ui, f"isoclay solver listening on {server.endpoint} (boot {server.boot_id[:8]}); connection file "
                 f"{server.connection_path}; data in {server.data_dir}"
                 + (f"; {len(server.interrupted)} interrupted job(s) can be resumed" if server.interrupted else ""))

    return run_server(config, ready, watch_stdin=args.watch_stdin)


def _say(ui, text: str) -> None:
    if ui is not None:
        ui.info(text)
    else:
        sys.stderr.write(text + "\n")
        sys.stderr.flush()


def _reexec_without_torch() -> None:
    """Replace this process by a clean `python -m isoclay.service.server` when torch got imported.

    The `isoclay` command imports every subcommand, and some import torch; the server process
    itself must stay small (workers import torch), so it starts afresh with the same options
    (same pid on POSIX, so supervisors and Ctrl-C keep working).
    """
    import threading

    if "torch" not in sys.modules or os.name != "posix" or os.environ.get("ISOCLAY_SERVE_CLEAN"):
        return
    if threading.active_count() > 1:
        return  # embedded by a launcher with threads of its own (exec would silently end them)
    argv = list(sys.argv)
    if "serve" not in argv:
        return  # called programmatically: leave it alone
    rest = argv[argv.index("serve") + 1:]
    root = str(Path(__file__).resolve().parents[2])
    env = dict(os.environ, ISOCLAY_SERVE_CLEAN="1")
    env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    sys.stdout.flush()
    sys.stderr.flush()
    os.execve(sys.executable, [sys.executable, "-m", "isoclay.service.server", *rest], env)
