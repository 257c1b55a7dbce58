"""Regenerate ``sample_panel/`` from the ``road-salt`` preset.

Writes the demo's sources (``panel.csv``, ``costs.csv``, ``national.csv``,
``firms.csv``), ``study.toml``, ``truth.json`` and ``truth_observations.csv``
into ``sample_panel/`` beside this script's folder; ``sample_panel/README.md`` is
kept.  The output is byte-identical on every run (fixed seed, sorted keys).

Usage::

    python scripts/make_sample.py [OUT_DIR]
"""

from __future__ import annotations

import sys
from pathlib import Path

from conduct.presets import PRESETS, preset_files, write_study

ROOT = Path(__file__).resolve().parents[1]


def main(argv: list[str]) -> int:
    """Write the demo study and print where it went.

    Parameters
    ----------
    argv : list of str
        Optional output folder (default ``sample_panel/`` in the repository).

    Returns
    -------
    int
        Exit code 0.
    """
    out = Path(argv[0]) if argv else ROOT / "sample_panel"
    study = write_study(out, PRESETS["road-salt"], fmt="csv")
    print(f"wrote {study.parent}: {', '.join(preset_files('road-salt'))}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
