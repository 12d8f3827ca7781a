"""`denude report MAPDIR --out REPORT.html`: a self-contained page a planner can read."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors


def report(
    mapdir: Annotated[Path, typer.Argument(help="Output folder of 'denude map'.", exists=True, file_okay=False)],
    out: Annotated[Path, typer.Option(help="Report HTML file; its figures go into <stem>_figures/ beside it.", dir_okay=False)],
    summary: Annotated[Optional[Path], typer.Option(help="Summary GeoPackage of 'denude summarize' (watershed and planning-unit tables and maps).", exists=True, dir_okay=False)] = None,
    title: Annotated[Optional[str], typer.Option(help="Region name in the headline (default: the lithology's 'region' tag, else the folder name).")] = None,
    pdf: Annotated[bool, typer.Option(help="Also print the page to PDF (needs a headless Chromium).")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors and warnings.")] = False,
):
    """One HTML page (images inline, opens offline) with maps, tables and provenance."""
    from denude.reports.html_report import build_report

    result = build_report(mapdir, out, summary=summary, title=title, pdf=pdf)
    if result.pdf_note:
        typer.echo(f"denude: warning: {result.pdf_note}", err=True)
    if not quiet:
        typer.echo(f"wrote {result.html} and {len(result.figures)} figures in {result.figures_dir}")
        if result.pdf is not None:
            typer.echo(f"wrote {result.pdf}")
        typer.echo(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("report")(handle_user_errors(report))
