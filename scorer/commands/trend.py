"""``limen trend``: the trend report of a nightly database (HTML page, CSV and JSON)."""

from __future__ import annotations

import click

from scorer.commands import options
from scorer.reports import dumps


@click.command("trend")
@options.nightly_db()
@options.out_folder("Write trend.html, trend.csv, alerts.csv and trend.json here.", required=True)
@click.option(
    "--config",
    "config_file",
    type=click.Path(dir_okay=False),
    default=None,
    help="Nightly configuration: programme name and control-limit settings for the plots.",
)
@click.option(
    "--method",
    type=click.Choice(["dprime", "count"]),
    default=None,
    help="Threshold method to plot (default: each detector's verdict method).",
)
@options.json_output("Print the paths written as JSON.")
@options.replace()
def trend(db: str, out_dir: str, config_file: str | None, method: str | None, as_json: bool, replace: bool) -> None:
    """Write the trend report of a nightly database."""
    from scorer.commands.nightly import db_url_option, load_nightly_config
    from scorer.files import OutputFolder
    from scorer.qc import open_store
    from scorer.reports.trend import write_trend_report

    config = load_nightly_config(config_file)
    folder = OutputFolder(out_dir, replace=replace, command="trend")
    store = open_store(db_url_option(db), create=False)
    try:
        page = write_trend_report(store, out_dir, config.alerts, config.programme, method=method, config=config)
    finally:
        store.close()
    folder.finish()
    if as_json:
        click.echo(
            dumps(
                {
                    "report": str(page),
                    "csv": str(page.with_name("trend.csv")),
                    "alerts_csv": str(page.with_name("alerts.csv")),
                    "json": str(page.with_name("trend.json")),
                }
            )
        )
    else:
        click.echo(f"trend report: {page}  (trend.csv, alerts.csv, trend.json beside it)")
