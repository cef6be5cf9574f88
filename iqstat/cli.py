"""The ``iqstat`` command line: parses arguments, calls the library, maps errors to exit 2.

Every :class:`~iqstat.errors.IqstatError` becomes one line on stderr and exit status 2; a
warning becomes one line on stderr. Set ``IQSTAT_DEBUG=1`` to see tracebacks.
"""

from __future__ import annotations

import functools
import os
import sys
import warnings
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from iqstat import __version__
from iqstat.errors import IqstatError, IqstatWarning
from iqstat.units import parse_quantity

app = typer.Typer(
    name="iqstat",
    help="Eb/N0, error rate and margin of noncoherent FSK/OOK links from IQ captures. "
    "iqstat only reads recordings; it never transmits.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
)

_err = Console(stderr=True, highlight=False, soft_wrap=True)


def _rate(name: str):
    def parse(text: str) -> float:
        try:
            return parse_quantity(text, name)
        except IqstatError as exc:
            raise typer.BadParameter(str(exc)) from None

    return parse


DatatypeOpt = Annotated[
    str | None,
    typer.Option("--datatype", help="SigMF datatype of a raw file, e.g. cu8, ci16_le, cf32_le."),
]
RateOpt = Annotated[
    float | None,
    typer.Option(
        "--sample-rate",
        parser=_rate("--sample-rate"),
        metavar="RATE",
        help="Sample rate of a raw file (or of SigMF metadata lacking it): 250k, 2.4M.",
    ),
]
FreqOpt = Annotated[
    float | None,
    typer.Option(
        "--center-frequency",
        parser=_rate("--center-frequency"),
        metavar="FREQ",
        help="Centre frequency of a raw file, e.g. 869.5MHz.",
    ),
]
HeaderOpt = Annotated[
    int, typer.Option("--header-bytes", min=0, help="Bytes to skip at the start of a raw file.")
]
ChannelOpt = Annotated[
    int, typer.Option("--channel", min=0, help="Channel of a multi-channel recording (0-based).")
]
RecordingOpt = Annotated[
    str | None,
    typer.Option("--recording", help="Recording to read from a .sigmf archive holding several."),
]
VerifyOpt = Annotated[
    bool,
    typer.Option(
        "--verify", help="Check the data against core:sha512 first (reads the file once more)."
    ),
]


def _show_warning(message, category, filename, lineno, file=None, line=None):
    if issubclass(category, IqstatWarning):
        _err.print(f"iqstat: warning: {message}", markup=False)
    else:
        _err.print(f"iqstat: warning: {category.__name__}: {message}", markup=False)


def _cli_errors(func):
    """Run a command with iqstat's error contract: IqstatError → one stderr line, exit 2."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with warnings.catch_warnings():
            warnings.simplefilter("always", IqstatWarning)
            warnings.showwarning = _show_warning
            try:
                return func(*args, **kwargs)
            except IqstatError as exc:
                _err.print(f"iqstat: error: {exc}", markup=False)
                raise typer.Exit(code=2) from None

    return wrapper


def _open(path, datatype, sample_rate, center_frequency, header_bytes, channel, recording, verify):
    from iqstat.formats.open import open_capture

    return open_capture(
        path,
        datatype=datatype,
        sample_rate_hz=sample_rate,
        center_frequency_hz=center_frequency,
        header_bytes=header_bytes,
        channel=channel,
        recording=recording,
        verify=verify,
    )


@app.command()
@_cli_errors
def describe(
    capture: Annotated[
        Path,
        typer.Argument(
            help="SigMF meta/data/base name, .sigmf archive, or raw file.", show_default=False
        ),
    ],
    datatype: DatatypeOpt = None,
    sample_rate: RateOpt = None,
    center_frequency: FreqOpt = None,
    header_bytes: HeaderOpt = 0,
    channel: ChannelOpt = 0,
    recording: RecordingOpt = None,
    verify: VerifyOpt = False,
    json_out: Annotated[
        bool, typer.Option("--json", help="Print the facts as JSON on stdout.")
    ] = False,
) -> None:
    """Facts of a capture from one streaming pass: levels, clipping, DC, spectrum, noise floor."""
    from iqstat.facts import compute_facts
    from iqstat.report.describe import render_facts
    from iqstat.report.jsonio import write_json

    cap = _open(
        capture, datatype, sample_rate, center_frequency, header_bytes, channel, recording, verify
    )
    facts = compute_facts(cap)
    if json_out:
        write_json({"format": "iqstat-facts", "format_version": 1, **facts.to_dict()}, "-")
    else:
        render_facts(facts, Console(highlight=False))
        if not facts.is_complex:
            _err.print(
                "iqstat: warning: this recording is real-valued; Eb/N0 measurement needs "
                "complex baseband (I/Q) samples",
                markup=False,
            )


@app.command()
@_cli_errors
def measure(
    capture: Annotated[
        Path,
        typer.Argument(
            help="SigMF meta/data/base name, .sigmf archive, or raw file.", show_default=False
        ),
    ],
    profile: Annotated[
        Path | None, typer.Option("--profile", help="Link profile (TOML): what was sent.")
    ] = None,
    modulation: Annotated[
        str | None, typer.Option("--modulation", help="2fsk, 4fsk or ook (overrides the profile).")
    ] = None,
    symbol_rate: Annotated[
        float | None,
        typer.Option(
            "--symbol-rate",
            parser=_rate("--symbol-rate"),
            metavar="RATE",
            help="Symbol rate, e.g. 4800 or 4.8k (overrides the profile).",
        ),
    ] = None,
    tone_spacing: Annotated[
        float | None,
        typer.Option(
            "--tone-spacing",
            parser=_rate("--tone-spacing"),
            metavar="FREQ",
            help="FSK tone spacing, e.g. 4.8k (overrides the profile).",
        ),
    ] = None,
    required_ber: Annotated[
        float | None,
        typer.Option(
            "--required-ber", help="The link's required BER, e.g. 1e-5 (overrides the profile)."
        ),
    ] = None,
    datatype: DatatypeOpt = None,
    sample_rate: RateOpt = None,
    center_frequency: FreqOpt = None,
    header_bytes: HeaderOpt = 0,
    channel: ChannelOpt = 0,
    recording: RecordingOpt = None,
    verify: VerifyOpt = False,
    json_path: Annotated[
        str | None,
        typer.Option(
            "--json", metavar="PATH", help="Write the report as JSON to PATH ('-' for stdout)."
        ),
    ] = None,
) -> None:
    """Eb/N0 with its confidence interval, predicted and measured BER, and margin."""
    from iqstat.measure import measure_capture
    from iqstat.profile import load_profile, override_profile
    from iqstat.report.jsonio import write_text
    from iqstat.report.measurement import render_report, report_json_pieces

    base = load_profile(profile) if profile is not None else None
    prof = override_profile(
        base,
        modulation=modulation,
        symbol_rate_hz=symbol_rate,
        tone_spacing_hz=tone_spacing,
        required_ber=required_ber,
    )
    cap = _open(
        capture, datatype, sample_rate, center_frequency, header_bytes, channel, recording, verify
    )
    report = measure_capture(cap, prof)
    if json_path is not None:
        write_text(report_json_pieces(report), json_path)
    if json_path != "-":
        render_report(report, Console(highlight=False))


@app.command()
@_cli_errors
def synth(
    scenario: Annotated[Path, typer.Argument(help="Scenario file (TOML).", show_default=False)],
    out: Annotated[
        Path, typer.Option("--out", help="Folder to write the recording and its truth file into.")
    ],
    seed: Annotated[
        int | None, typer.Option("--seed", help="Random seed (default: the scenario's own).")
    ] = None,
    overwrite: Annotated[bool, typer.Option("--overwrite", help="Replace existing files.")] = False,
) -> None:
    """Write a synthetic SigMF recording with known truth (for testing receivers and iqstat).

    The output is for analysis only: never transmit it.
    """
    from iqstat.synth import write_synthetic

    if out.exists() and not out.is_dir():
        raise IqstatError(f"--out {out} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    result = write_synthetic(scenario, out, seed=seed, overwrite=overwrite)
    Console(highlight=False).print(
        f"wrote {result.meta_path}, {result.data_path} and {result.truth_path}", markup=False
    )


def _version(value: bool) -> None:
    if value:
        print(f"iqstat {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_version, is_eager=True, help="Show the version and exit."
        ),
    ] = False,
) -> None:
    """Eb/N0, error rate and margin of noncoherent FSK/OOK links from IQ captures."""


def main(argv: list[str] | None = None) -> None:
    """Console-script entry point."""
    warnings.showwarning = _show_warning
    try:
        code = app(args=argv, prog_name="iqstat", standalone_mode=False)
    except IqstatError as exc:
        _err.print(f"iqstat: error: {exc}", markup=False)
        sys.exit(2)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        _err.print("iqstat: aborted", markup=False)
        sys.exit(130)
    except KeyboardInterrupt:
        _err.print("iqstat: interrupted", markup=False)
        sys.exit(130)
    except Exception as exc:  # noqa: BLE001 - the last line of defence against tracebacks
        if os.environ.get("IQSTAT_DEBUG"):
            raise
        click_exc = _click_error(exc)
        if click_exc is not None:
            _err.print(f"iqstat: error: {click_exc}", markup=False)
            sys.exit(2)
        _err.print(
            f"iqstat: internal error: {type(exc).__name__}: {exc} (please report it; "
            "IQSTAT_DEBUG=1 shows the traceback)",
            markup=False,
        )
        sys.exit(1)
    sys.exit(code if isinstance(code, int) else 0)


def _click_error(exc: Exception) -> str | None:
    """Usage errors of typer's bundled click, as one line (None if not one)."""
    fmt = getattr(exc, "format_message", None)
    if callable(fmt) and getattr(exc, "exit_code", None) == 2:
        ctx = getattr(exc, "ctx", None)
        cmd = f" (see 'iqstat {ctx.info_name} --help')" if ctx is not None and ctx.parent else ""
        return fmt().replace("\n", " ") + cmd
    return None


if __name__ == "__main__":
    main()
