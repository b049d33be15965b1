"""Build the demo ledger (an invented benchtop liquid handler) from ``demo.toml``.

Usage::

    python sample_db/build_demo.py [--out PATH] [--spec PATH] [--quiet]

The old file (and its ``-wal``/``-shm`` companions) is deleted, a fresh ledger is created,
the spec is imported in one transaction, every revision is verified against every applicable
requirement over the whole plant family, and the write-ahead log is folded back into the
file so that the result is one self-contained SQLite file.  The same spec gives the same
verdicts on every run (seeded Monte Carlo samples, deterministic engine).
"""

from __future__ import annotations

import argparse
import sqlite3
import sys
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

from ledger.api import open_ledger
from ledger.errors import LedgerError
from ledger.spec import import_spec

__all__ = ["DEFAULT_OUT", "DEFAULT_SPEC", "BUILD_AUTHOR", "BuildSummary", "build", "main"]

HERE = Path(__file__).resolve().parent
#: Where the committed demo ledger lives.
DEFAULT_OUT = HERE / "demo.db"
#: The spec the demo is built from.
DEFAULT_SPEC = HERE / "demo.toml"
#: Author recorded on records the spec does not name an author for.
BUILD_AUTHOR = "demo-builder"


@dataclass(frozen=True)
class BuildSummary:
    """What a build produced.

    Attributes
    ----------
    path : Path
        The ledger file written.
    loops, revisions, requirements : int
        Record counts.
    verdicts : dict
        Verdict -> number of results (one result per revision and applicable requirement).
    tips : dict
        Loop name -> label of its tip revision.
    """

    path: Path
    loops: int
    revisions: int
    requirements: int
    verdicts: dict = field(default_factory=dict)
    tips: dict = field(default_factory=dict)

    def lines(self) -> list[str]:
        """The summary as short printable lines."""
        by = ", ".join(f"{k} {v}" for k, v in sorted(self.verdicts.items()))
        tips = ", ".join(f"{k}@{v}" for k, v in sorted(self.tips.items()))
        return [f"demo ledger written to {self.path}",
                f"  loops {self.loops}, revisions {self.revisions}, "
                f"requirements {self.requirements}",
                f"  results: {by or 'none'}",
                f"  tips: {tips}"]


def _remove(path: Path) -> None:
    for p in (path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
        try:
            p.unlink()
        except FileNotFoundError:
            pass
        except OSError as e:
            raise LedgerError(f"cannot remove old demo file {p} ({e.strerror}); close programs "
                              "that hold it open and retry") from e


def _fold_wal(path: Path) -> None:
    """Checkpoint the write-ahead log into the main file and leave rollback-journal mode."""
    try:
        con = sqlite3.connect(path)
        try:
            con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            con.execute("PRAGMA journal_mode=DELETE")
            con.execute("VACUUM")
        finally:
            con.close()
    except sqlite3.Error as e:
        raise LedgerError(f"cannot fold the write-ahead log into {path} ({e}); is another "
                          "program using the file?") from e


def build(out: str | Path = DEFAULT_OUT, spec: str | Path = DEFAULT_SPEC) -> BuildSummary:
    """Build the demo ledger at ``out`` from ``spec``; return a summary.

    Parameters
    ----------
    out : str or Path
        SQLite file to (re)create.  An existing file there is deleted first.
    spec : str or Path
        Spec file (TOML) to import.

    Returns
    -------
    BuildSummary
    """
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    _remove(out)
    ledger = open_ledger(out, create=True, author=BUILD_AUTHOR)
    try:
        import_spec(ledger, spec)
        ledger.verify()
        loops = ledger.loops()
        verdicts: Counter = Counter()
        revisions = 0
        for lp in loops:
            for rev in ledger.revisions(lp.name):
                revisions += 1
                verdicts.update(r.verdict for r in ledger.results(lp.name, rev.label))
        summary = BuildSummary(path=out, loops=len(loops), revisions=revisions,
                               requirements=len(ledger.requirements()),
                               verdicts=dict(verdicts), tips={lp.name: lp.tip for lp in loops})
    finally:
        ledger.close()
    _fold_wal(out)
    return summary


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the process exit code."""
    parser = argparse.ArgumentParser(description="Build the demo ledger from demo.toml.")
    parser.add_argument("--out", default=str(DEFAULT_OUT),
                        help=f"ledger file to write (default {DEFAULT_OUT})")
    parser.add_argument("--spec", default=str(DEFAULT_SPEC),
                        help=f"spec file to import (default {DEFAULT_SPEC})")
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")
    args = parser.parse_args(argv)
    try:
        summary = build(args.out, args.spec)
    except LedgerError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    if not args.quiet:
        print("\n".join(summary.lines()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
