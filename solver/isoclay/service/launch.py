"""Starting a solver from options: what `isoclay serve` and `python -m isoclay.service.server` share.

The options, their documented ranges (docs/parameters.md), the ServerConfig they make, and the
start itself. The command module only registers these options with the CLI, so the server never
imports the command.
"""

from __future__ import annotations

import argparse
import os
import sys
import threading
from pathlib import Path

from ..bounds import number, whole_number
from ..errors import IsoclayError

DESCRIPTION = """Run the isoclay solver service.

By default it listens on 127.0.0.1 on a free port and writes a connection file (endpoint and
signing key, mode 0600 in a 0700 directory) that the Blender add-on reads. Only clients that
hold the connection file are admitted; every file in the data folder is private (0600).

CAUTION: a solver reachable over a network runs jobs and returns meshes for anyone who can
talk to it. isoclay refuses to listen beyond loopback unless CURVE encryption with an
allow-list of client public keys is configured (--curve-secret and --allow-keys). Create key
pairs with --new-key NAME; give each artist a connection file holding the server's public key
and that artist's own key pair; keep *.key_secret files private (they are written 0600). Each
client key sees only its own history unless --shared-history is given.
"""

#: (option, attribute, kind, low, high, unit, why) of every numeric option; docs/parameters.md has the table.
NUMERIC_OPTIONS = (
    ("--workers", "workers", "int", 1, 64, "jobs", "each running job is its own process with its own field"),
    ("--queue", "queue", "int", 1, 10_000, "jobs", "waiting jobs are kept in memory"),
    ("--memory-limit", "memory_limit", "float", 1.0, 4096.0, "GiB", "importing torch alone reserves about 0.65 GB"),
    ("--time-limit", "time_limit", "float", 1.0, 2_592_000.0, "s", "at most 30 days per job"),
    ("--cache-size", "cache_size", "float", 1 / 64, 4096.0, "GiB", "one field at resolution 128 is 9 MB"),
    ("--data-limit", "data_limit", "float", 0.25, 100_000.0, "GiB", "history is never evicted, only cached fields"),
    ("--job-threads", "job_threads", "int", 1, 256, "threads", "torch threads per job"),
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--endpoint", default=None,
                        help="where to listen (default tcp://127.0.0.1 on a free port; non-loopback needs CURVE; "
                             "tcp://[::1]:PORT for IPv6 loopback)")
    parser.add_argument("--connection-file", type=Path, default=None,
                        help="connection file to write (default: $XDG_RUNTIME_DIR/isoclay/solver.json or "
                             "~/.isoclay/run/solver.json); an existing one's key and port are reused")
    parser.add_argument("--data-dir", type=Path, default=None,
                        help="edit history, uploaded meshes and field cache (default ~/.local/share/isoclay)")
    parser.add_argument("--curve-secret", type=Path, default=None, help="the server's CURVE key file (NAME.key_secret)")
    parser.add_argument("--allow-keys", type=Path, default=None, help="directory of allowed client public keys (*.key)")
    parser.add_argument("--shared-history", action="store_true",
                        help="with CURVE: every allowed key sees and edits every object's history (default: each "
                             "client key sees only its own)")
    parser.add_argument("--new-key", metavar="NAME", default=None,
                        help="create NAME.key and NAME.key_secret in --keys-dir and exit")
    parser.add_argument("--keys-dir", type=Path, default=Path("isoclay-keys"), help="where --new-key writes")
    parser.add_argument("--workers", type=int, default=1, help="jobs running at once (default 1)")
    parser.add_argument("--queue", type=int, default=16, help="jobs waiting at most (default 16)")
    parser.add_argument("--memory-limit", type=float, default=8.0, help="GiB of address space per job (default 8)")
    parser.add_argument("--time-limit", type=float, default=3600.0, help="seconds per job (default 3600)")
    parser.add_argument("--cache-size", type=float, default=2.0, help="GiB of fitted fields kept (default 2)")
    parser.add_argument("--data-limit", type=float, default=20.0,
                        help="GiB the data folder may hold; past it cached fields are evicted, oldest first, and "
                             "uploads that still do not fit are refused (default 20)")
    parser.add_argument("--job-threads", type=int, default=None, help="torch threads per job (default: free cores)")
    parser.add_argument("--watch-stdin", action="store_true",
                        help="stop cleanly when standard input closes (for a parent such as Blender)")
    parser.add_argument("--test-params", action="store_true", help=argparse.SUPPRESS)


def check_options(args) -> None:
    """InvalidInput (one line, sane numbers) for any numeric option outside its range."""
    for option, attr, kind, lo, hi, unit, why in NUMERIC_OPTIONS:
        value = getattr(args, attr)
        if value is None:
            continue
        check = whole_number if kind == "int" else number
        check(option, value, lo, hi, unit, why)


def config_from_args(args):
    """The ServerConfig the options ask for (options already checked)."""
    from .auth import default_run_dir
    from .jobs import JobLimits
    from .server import ServerConfig, default_data_dir

    limits = JobLimits(max_queue=args.queue, max_workers=args.workers, memory_bytes=int(args.memory_limit * 2**30),
                       time_s=args.time_limit, cache_max_bytes=int(args.cache_size * 2**30),
                       data_max_bytes=int(args.data_limit * 2**30), threads=args.job_threads,
                       test_params=args.test_params)
    return ServerConfig(data_dir=args.data_dir or default_data_dir(), endpoint=args.endpoint,
                        connection_file=args.connection_file or default_run_dir() / "solver.json",
                        curve_secret=args.curve_secret, allow_keys=args.allow_keys,
                        shared_history=args.shared_history, limits=limits)


def run(args, say) -> int:
    """Serve with these options; ``say(text)`` reports one line (the console UI or standard error)."""
    from . import auth
    from .server import run_server

    if args.new_key:
        pub, sec = auth.create_keypair(args.keys_dir, args.new_key)
        say(f"wrote {pub} (public: put it in the server's --allow-keys directory) and {sec} (secret, 0600)")
        return 0
    reexec_without_torch()
    check_options(args)
    config = config_from_args(args)

    def ready(server):
        say(f"isoclay solver listening on {server.endpoint} (boot {server.boot_id[:8]}); connection file "
            f"{server.connection_path}; data in {server.data_dir}"
            + (f"; {len(server.interrupted)} interrupted job(s) can be resumed" if server.interrupted else ""))

    return run_server(config, ready, watch_stdin=args.watch_stdin)


def reexec_without_torch() -> None:
    """Replace this process by a clean `python -P -m isoclay.service.server` when torch got imported.

    The `isoclay` command imports every subcommand, and some import torch; the server process
    itself must stay small (workers import torch), so it starts afresh with the same options
    (same pid on POSIX, so supervisors and Ctrl-C keep working), never with the working folder
    on its path (processes.reexec_server).
    """
    from . import processes

    if "torch" not in sys.modules or os.name != "posix" or os.environ.get("ISOCLAY_SERVE_CLEAN"):
        return
    if threading.active_count() > 1:
        return  # embedded by a launcher with threads of its own (exec would silently end them)
    argv = list(sys.argv)
    if "serve" not in argv:
        return  # called programmatically: leave it alone
    processes.reexec_server(argv[argv.index("serve") + 1:])


def say_on_stderr(text: str) -> None:
    sys.stderr.write(text + "\n")
    sys.stderr.flush()


def main(argv=None) -> int:
    """`python -m isoclay.service.server ...`: parse, serve; a bad option is one line and exit code 2."""
    parser = argparse.ArgumentParser(prog="isoclay-serve", description=DESCRIPTION,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    add_arguments(parser)
    args = parser.parse_args(argv)
    try:
        return run(args, say_on_stderr)
    except IsoclayError as exc:
        sys.stderr.write(f"isoclay: {exc}\n")
        return exc.exit_code
