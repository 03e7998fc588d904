"""The `isoclay` command: parses arguments, reports progress, maps errors to exit codes.

Each subcommand lives in `isoclay/commands/<name>.py` with `add_parser(subparsers)` and
`run(args, ui) -> int`; this module only dispatches. Exit codes: 0 done, 1 internal error,
2 bad input (one line on stderr), 3 cancelled.
"""

from __future__ import annotations

import os

# Before anything imports torch: OpenMP reads its wait policy once, at start-up. Blender
# shares the CPU, and busy-waiting threads made steps 10x slower there (FACTS.md).
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import argparse
import importlib
import pkgutil
import signal
import sys
import time

from . import __version__, commands
from .errors import Cancelled, IsoclayError


class ConsoleUI:
    """Progress bars (rich) and messages on stderr; Ctrl-C turns into a cooperative stop.

    On a terminal each stage gets a live bar with its figures, elapsed time and ETA; elsewhere
    (logs, pipes) a plain line is written each time a stage passes a tenth of its way.
    """

    def __init__(self, stream=sys.stderr, quiet: bool = False):
        from rich.console import Console

        self.stream = stream
        self.quiet = quiet
        self.stop_requested = False
        self.console = Console(file=stream, highlight=False, soft_wrap=True)
        self._bars = None
        self._tasks: dict = {}
        self._logged: dict = {}

    def _bar_set(self):
        from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn, TimeElapsedColumn, TimeRemainingColumn

        if self._bars is None:
            self._bars = Progress(TextColumn("{task.description:<10}"), BarColumn(bar_width=24), TaskProgressColumn(),
                                  TextColumn("{task.fields[info]}"), TimeElapsedColumn(), TextColumn("eta"),
                                  TimeRemainingColumn(), console=self.console, transient=False)
            self._bars.start()
        return self._bars

    def progress(self, stage: str, fraction: float, info: dict) -> None:
        if self.quiet:
            return
        fraction = max(0.0, min(1.0, float(fraction)))
        extra = " ".join(f"{k}={_fmt(v)}" for k, v in list(info.items())[:5])
        if not self.console.is_terminal:
            tenth = int(fraction * 10)
            if self._logged.get(stage) != tenth:
                self._logged[stage] = tenth
                self.console.print(f"{stage:<10} {fraction * 100:5.1f}% {extra}")
            return
        bars = self._bar_set()
        if stage not in self._tasks:
            self._tasks[stage] = bars.add_task(stage, total=1.0, info="")
        bars.update(self._tasks[stage], completed=fraction, info=extra)

    def should_stop(self) -> bool:
        return self.stop_requested

    def info(self, message: str) -> None:
        if not self.quiet:
            self.console.print(message, markup=False)

    def warn(self, message: str) -> None:
        self.console.print(f"warning: {message}", markup=False)

    def close(self) -> None:
        """Stop the live bars (leaves their last state on screen)."""
        if self._bars is not None:
            self._bars.stop()
            self._bars = None


def _fmt(v) -> str:
    return f"{v:.3g}" if isinstance(v, float) else str(v)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="isoclay", description="Reshape meshes through a fitted signed-distance field.")
    parser.add_argument("--version", action="version", version=f"isoclay {__version__}")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")
    parser.add_argument("--threads", type=int, default=None, help="CPU threads for torch (default: free cores)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for info in sorted(pkgutil.iter_modules(commands.__path__), key=lambda m: m.name):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"{commands.__name__}.{info.name}")
        module.add_parser(sub).set_defaults(_run=module.run)
    return parser



def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse already printed a one-line usage error
        return 0 if exc.code == 0 else 2
    if not getattr(args, "_run", None):
        parser.print_help(sys.stderr)
        return 2
    ui = ConsoleUI(quiet=args.quiet)

    def on_interrupt(signum, frame):
        if ui.stop_requested:  # second Ctrl-C: give up at once
            raise KeyboardInterrupt
        ui.stop_requested = True
        ui.warn("stopping after the current step (Ctrl-C again to abort)")

    previous = signal.signal(signal.SIGINT, on_interrupt)
    try:
        from .runtime import configure_torch

        if getattr(args, "needs_torch", True):
            configure_torch(args.threads)
        return int(args._run(args, ui) or 0)
    except Cancelled as exc:
        sys.stderr.write(f"isoclay: {exc}\n")
        return 3
    except IsoclayError as exc:
        sys.stderr.write(f"isoclay: {exc}\n")
        return exc.exit_code
    except KeyboardInterrupt:
        sys.stderr.write("isoclay: aborted; nothing was written\n")
        return 3
    except MemoryError:
        sys.stderr.write("isoclay: out of memory: lower --resolution or decimate the mesh\n")
        return 1
    except Exception as exc:  # internal error: one line, details only with ISOCLAY_DEBUG=1
        import traceback

        if os.environ.get("ISOCLAY_DEBUG"):
            traceback.print_exc()
        sys.stderr.write(f"isoclay: internal error ({type(exc).__name__}: {exc}); rerun with ISOCLAY_DEBUG=1 for details\n")
        return 1
    finally:
        ui.close()
        signal.signal(signal.SIGINT, previous)


if __name__ == "__main__":
    sys.exit(main())
