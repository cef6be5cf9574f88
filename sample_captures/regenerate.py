"""Regenerate the sample captures of this folder from their scenario files.

    python sample_captures/regenerate.py

Every ``*.toml`` here except ``link.toml`` (the link profile used to measure them) is a
scenario; each is written beside it as NAME.sigmf-meta, NAME.sigmf-data and NAME.truth.json
with the scenario's own ``[capture] seed``. Output is byte-identical from run to run.
"""

from __future__ import annotations

from pathlib import Path

from iqstat.synth import write_synthetic

HERE = Path(__file__).resolve().parent
PROFILE = "link.toml"


def main() -> None:
    for scenario in sorted(HERE.glob("*.toml")):
        if scenario.name == PROFILE:
            continue
        out = write_synthetic(scenario, HERE, overwrite=True)
        size = out.data_path.stat().st_size
        print(
            f"{scenario.name}: {out.n_samples} samples, {size / 1e6:.2f} MB, "
            f"{out.n_clipped} clipped components -> {out.meta_path.name}"
        )


if __name__ == "__main__":
    main()
