"""``limen trend``: the trend report of a nightly database (HTML page, CSV and JSON)."""

from __future__ import annotations

import click

from scorer.reports import dumps


@click.command("trend")
@click.option("--db", "db", required=True, help="Database URL or SQLite file written by `limen nightly`.")
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False),
    required=True,
    help="Write trend.html, trend.csv, alerts.csv and trend.json here.",
)
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
@click.option("--json", "as_json", is_flag=True, help="Print the paths written as JSON.")
@click.option(
    "--replace",
    is_flag=True,
    help="Let --out name a folder an earlier run wrote to: its files are replaced (others are kept).",
)
def trend(db, out_dir, config_file, method, as_json, replace):
    """Write the trend report of a nightly database."""
    from scorer.commands.nightly import db_url_option, load_nightly_config
    from scorer.qc import open_store
    from scorer.reports.trend import write_trend_report

    from scorer.files import OutputFolder

    config = load_nightly_config(config_file)
    folder = OutputFolder(out_dir, replace=replace, command="trend")
    store = open_store(db_url_option(db))
    try:
        page = write_trend_report(store, out_dir, config.alerts, config.programme, method=method)
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
