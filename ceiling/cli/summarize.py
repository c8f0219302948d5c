"""``ceiling summarize RUN_DIR --zones FILE``: summarise a run's maps over polygons (zones.csv, zones.gpkg)."""

from __future__ import annotations

from pathlib import Path

import click

from .options import handle_errors, overwrite_opt


@click.command("summarize")
@click.argument("run_dir", type=click.Path(path_type=Path))
@click.option("--zones", "zones", required=True, type=click.Path(path_type=Path),
              help="Polygons to summarise over (GeoPackage, Shapefile, GeoJSON, ...; any CRS).")
@click.option("--id-field", "id_field", default=None, help="Attribute naming each zone (default: number the zones 1..N).")
@click.option("--layer", "layer", default=None, help="Layer of a multi-layer zones file.")
@overwrite_opt
@click.pass_context
@handle_errors
def summarize(ctx: click.Context, run_dir: Path, zones: Path, id_field: str | None, layer: str | None, overwrite: bool) -> None:
    """Areas of zone classes and of novel climate, mean and median ceilings, change and limiting
    factors per zone, for every species and climate of RUN_DIR; writes RUN_DIR/zones.csv and
    RUN_DIR/zones.gpkg."""
    from ..zones import summarize_zones

    res = summarize_zones(run_dir, zones, id_field=id_field, layer=layer, overwrite=overwrite)
    if not ctx.obj.get("quiet"):
        click.echo(res.summary())
        click.echo(f"\nwrote {', '.join(p.name for p in res.written)} to {run_dir}")
