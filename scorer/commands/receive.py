"""``limen receive``: a DICOM node (Storage SCP) that writes the modalities' QC images into the nightly inbox."""

from __future__ import annotations

import sys
from types import FrameType

import click


def _say(text: str) -> None:
    """One timestamped line on stdout, flushed at once (journald and tests read it as it comes)."""
    import datetime as _dt

    click.echo(f"{_dt.datetime.now().isoformat(timespec='seconds')} {text}")
    sys.stdout.flush()  # click.get_text_stream is deprecated (Click 8.2) and resolves to sys.stdout


@click.command("receive")
@click.option(
    "--config",
    "config_file",
    type=click.Path(dir_okay=False),
    required=True,
    help="Nightly configuration (limen-nightly/1 TOML) with a [receive] table: AE title, port, bind address, "
    "calling AE titles allowed, inbox.",
)
@click.option(
    "--port",
    type=click.IntRange(0, 65535),
    default=None,
    help="Listen on this TCP port instead of the configured one (0: any free port, printed at start).",
)
def receive(config_file: str, port: int | None) -> None:
    """Receive phantom images from the modalities over DICOM (C-STORE) into the nightly inbox.

    Answers C-ECHO; accepts digital X-ray and digital mammography images (FOR PROCESSING and FOR PRESENTATION)
    from the calling AE titles listed in [receive]; writes each image completely before acknowledging it.
    Prints one line per association. Runs until SIGTERM or SIGINT.

    Exit status: 0 stopped by a signal, 2 bad configuration (unwritable inbox, port in use, unknown address).
    """
    import signal
    import threading

    from scorer.qc.config import load_receive_config
    from scorer.qc.receiver import Receiver

    config = load_receive_config(config_file)
    receiver = Receiver(config, log=_say, port=port)
    stop = threading.Event()
    got: list[str] = []

    def on_signal(signum: int, _frame: FrameType | None) -> None:
        got.append(signal.Signals(signum).name)
        stop.set()

    previous = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        host, bound = receiver.start()
        _say(
            f"limen receive: {config.ae_title} listening on {host}:{bound}, writing to {config.inbox}; "
            f"calling AE titles allowed: {', '.join(config.calling_ae_titles)}"
        )
        while not stop.wait(0.5):
            pass
        receiver.stop_listening()
        _say(f"{got[0] if got else 'stop'}: no new associations; waiting for open ones to finish")
        receiver.stop()
    finally:
        receiver.stop(grace_s=0)  # after an error: nothing open; after stop(): already stopped
        for s, h in previous.items():
            signal.signal(s, h)
    t = receiver.totals
    _say(
        f"stopped: {t['associations']} association(s) ({t['rejected']} rejected), {t['stored']} image(s) stored, "
        f"{t['refused']} image(s) refused"
    )
