"""The ``pmap`` command line: parse, build a config, call the library, map errors to exit codes.

Exit codes: 0 success, 1 unexpected failure (a crash, or an input that cannot be read),
2 bad command line or configuration, 3 bad input data, 4 the output directory cannot be
written: it exists and may not be replaced, another run holds it, or writing failed (e.g.
no space left on device; nothing is left half-written), 5 a model could not be fitted.
"""

from __future__ import annotations

import logging
import sys
import warnings
from pathlib import Path

import click

from pmap._version import __version__
from pmap.cautions import CAUTIONS_SHORT
from pmap.errors import PmapError, exit_code_of

__all__ = ["main", "cli"]


def _setup_logging(verbose: int, quiet: bool) -> None:
    level = {0: logging.WARNING, 1: logging.INFO}.get(verbose, logging.DEBUG)
    if quiet:
        level = logging.ERROR
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("pmap: %(message)s"))
    root = logging.getLogger("pmap")
    root.handlers[:] = [handler]
    root.setLevel(level)

    def show(message, category, filename, lineno, file=None, line=None):  # noqa: ARG001
        if not quiet:
            click.echo(f"pmap: warning: {message}", err=True)

    warnings.showwarning = show


def _report(result, out: Path) -> None:
    click.echo(f"CAUTION: {CAUTIONS_SHORT}", err=True)
    if click.get_current_context().find_root().params.get("quiet"):
        return
    totals = result.totals
    click.echo(f"wrote {len(result.outputs)} outputs to {out}")
    click.echo(
        f"  field area {totals['area_ha']:.2f} ha, {len(result.patches)} rate-zone polygons, "
        f"{totals['p2o5_total_kg']:.0f} kg P2O5 = {totals['product_total_kg']:.0f} kg "
        f"{totals['product']} in total"
    )
    click.echo(f"  rates driven by: {result.stp_source['description']}")
    if result.prescription.get("single_rate_notice"):
        click.echo(f"  {result.prescription['single_rate_notice']}")
    for name, interp in result.interpolations.items():
        cv = interp.cv
        click.echo(
            f"  {name:<15} {interp.model.kind:<11} cross-validation RMSE {cv.rmse:.3g}, "
            f"mean error {cv.mean_error:+.2g}, MSDR {cv.msdr:.2f}"
        )


def _run_safely(func, *args, **kwargs):
    try:
        return func(*args, **kwargs)
    except PmapError as exc:
        code = exit_code_of(exc)
        message = " ".join(str(exc).split())
        click.echo(f"pmap: error: {message}", err=True)
        sys.exit(code)
    except OSError as exc:  # not one pmap turned into an OutputError: say it in one line
        click.echo(f"pmap: error: cannot read or write a file: {exc}", err=True)
        sys.exit(1)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="pmap (soil phosphorus maps)",
                      message="%(prog)s %(version)s")
@click.option("-v", "--verbose", count=True, help="More progress messages (-vv for debugging).")
@click.option("-q", "--quiet", is_flag=True,
              help="Only errors and the caution: no warnings, progress or report.")
def cli(verbose: int, quiet: bool) -> None:
    """pmap: soil samples to phosphorus availability, fixation-risk, zone and P2O5 rate maps.

    Outputs are estimates for review: check rates against local regulations and
    nutrient-management rules, and have them signed off by a certified agronomist.
    """
    _setup_logging(verbose, quiet)


_MAPS_HELP = ("Review pictures: all (every map, the sheets and the report; default), "
              "overview (the overview sheet and the report) or none (sets output.maps).")


@cli.command()
@click.argument("out", type=click.Path(path_type=Path, file_okay=False))
@click.option("--overwrite", is_flag=True, help="Replace OUT if it exists and is not empty.")
@click.option("--maps", type=click.Choice(["all", "overview", "none"]), help=_MAPS_HELP)
def demo(out: Path, overwrite: bool, maps: str | None) -> None:
    """Run the whole job on the bundled invented demo field and write the outputs into OUT."""
    from pmap.demo import run_demo

    result = _run_safely(run_demo, out, overwrite=overwrite, maps=maps)
    _report(result, out)


@cli.command()
@click.argument("samples", type=click.Path(path_type=Path, dir_okay=False))
@click.option("--boundary", "-b", required=True, type=click.Path(path_type=Path, dir_okay=False),
              help="Field boundary: GeoJSON, GeoPackage or Shapefile.")
@click.option("--out", "-o", required=True, type=click.Path(path_type=Path, file_okay=False),
              help="Output directory (refused if it exists and is not empty).")
@click.option("--config", "-c", "config_path", type=click.Path(path_type=Path, dir_okay=False),
              help="Field configuration TOML (see docs/configuration.md).")
@click.option("--crs", help="CRS of projected x/y sample columns, e.g. EPSG:32616 (sets grid.crs).")
@click.option("--cell-size", type=float, help="Output cell size in metres (sets grid.cell_size_m).")
@click.option("--field", "feature",
              help="Use one feature of a boundary file holding several fields: its name, "
              "ATTR=VALUE, or '#N' for the N-th (sets field.boundary_feature).")
@click.option("--each-field", is_flag=True,
              help="Run every feature of the boundary file as its own field, into OUT/<name>/.")
@click.option("--vector-crs",
              help="CRS of the GeoPackage and Shapefile, e.g. EPSG:4326 for in-cab displays "
              "(sets output.vector_crs; default the run's CRS).")
@click.option("--units", type=click.Choice(["metric", "us"]),
              help="Units of the rate tables and attributes (sets rates.units).")
@click.option("--maps", type=click.Choice(["all", "overview", "none"]), help=_MAPS_HELP)
@click.option("--overwrite", is_flag=True, help="Replace OUT if it exists and is not empty.")
def run(samples: Path, boundary: Path, out: Path, config_path: Path | None, crs: str | None,
        cell_size: float | None, feature: str | None, each_field: bool,
        vector_crs: str | None, units: str | None, maps: str | None, overwrite: bool) -> None:
    """Map one field: SAMPLES (CSV, GeoJSON, GeoPackage or Shapefile) inside --boundary."""
    from pmap.config import load_config
    from pmap.pipeline import run_each_feature, run_field

    config = _run_safely(load_config, config_path)
    for section, changes in (("grid", {"crs": crs, "cell_size_m": cell_size}),
                             ("field", {"boundary_feature": feature}),
                             ("output", {"vector_crs": vector_crs, "maps": maps}),
                             ("rates", {"units": units})):
        changes = {k: v for k, v in changes.items() if v is not None}
        if changes:
            config = _run_safely(config.replace, section, **changes)
    if each_field:
        if feature:
            raise click.UsageError("--field and --each-field exclude each other")
        results = _run_safely(run_each_feature, samples, boundary, out, config,
                              overwrite=overwrite, config_path=config_path)
        click.echo(f"CAUTION: {CAUTIONS_SHORT}", err=True)
        failed = 0
        for name, out_dir, result in results:
            if isinstance(result, PmapError):
                failed += 1
                click.echo(f"  {name}: FAILED: {' '.join(str(result).split())}", err=True)
            else:
                click.echo(f"  {name}: {result.totals['area_ha']:.2f} ha, "
                           f"{result.totals['p2o5_total_kg']:.0f} kg P2O5 -> {out_dir}")
        click.echo(f"{len(results) - failed} of {len(results)} fields written under {out}")
        sys.exit(3 if failed else 0)
    result = _run_safely(run_field, samples, boundary, out, config, overwrite=overwrite,
                         config_path=config_path)
    _report(result, out)


@cli.command()
@click.argument("samples", type=click.Path(path_type=Path, dir_okay=False))
@click.option("--boundary", "-b", required=True, type=click.Path(path_type=Path, dir_okay=False),
              help="Field boundary: GeoJSON, GeoPackage or Shapefile.")
@click.option("--config", "-c", "config_path", type=click.Path(path_type=Path, dir_okay=False),
              help="Field configuration TOML (see docs/configuration.md).")
@click.option("--crs", help="CRS of projected x/y sample columns, e.g. EPSG:32616 (sets grid.crs).")
@click.option("--cell-size", type=float, help="Output cell size in metres (sets grid.cell_size_m).")
@click.option("--out", "-o", type=click.Path(path_type=Path, file_okay=False),
              help="Also check that this output directory could be written.")
@click.option("--overwrite", is_flag=True, help="With --out: as `pmap run --overwrite` would.")
@click.option("--json", "as_json", is_flag=True, help="Print the problems as JSON.")
def check(samples: Path, boundary: Path, config_path: Path | None, crs: str | None,
          cell_size: float | None, out: Path | None, overwrite: bool, as_json: bool) -> None:
    """List every problem `pmap run` would meet with these inputs, without running the job.

    Exit code 0 when no error is found (warnings are listed but do not fail the check),
    otherwise the code `pmap run` would exit with for the first error.
    """
    import json

    from pmap.config import load_config
    from pmap.preflight import check_field, exit_code

    config = _run_safely(load_config, config_path)
    changes = {k: v for k, v in (("crs", crs), ("cell_size_m", cell_size)) if v is not None}
    if changes:
        config = _run_safely(config.replace, "grid", **changes)
    problems = check_field(samples, boundary, config, out_dir=out, overwrite=overwrite)
    if as_json:
        click.echo(json.dumps([p.as_dict() for p in problems], indent=2))
    else:
        for p in problems:
            click.echo(f"{p.severity}: [{p.stage}] {p.message}")
        errors = sum(p.severity == "error" for p in problems)
        click.echo(f"{samples}: {errors} error(s), {len(problems) - errors} warning(s)"
                   + ("" if errors else "; pmap run would go ahead"))
    sys.exit(exit_code(problems))


@cli.command()
@click.argument("samples", type=click.Path(path_type=Path, dir_okay=False))
@click.option("--out", "-o", required=True, type=click.Path(path_type=Path, dir_okay=False),
              help="Parameter file to write (TOML; pass it to `pmap run --config`).")
@click.option("--config", "-c", "config_path", type=click.Path(path_type=Path, dir_okay=False),
              help="Configuration whose [soil], [samples] and [calibration] steer the fit.")
@click.option("--crs", help="CRS of projected x/y sample columns, e.g. EPSG:32616.")
@click.option("--overwrite", is_flag=True, help="Replace --out if it exists.")
def calibrate(samples: Path, out: Path, config_path: Path | None, crs: str | None,
              overwrite: bool) -> None:
    """Fit the soil model to SAMPLES holding pH, total P and a lab soil-test P together.

    Writes the calibrated parameters with their cross-validated error and confidence
    intervals; reuse the file for the region's fields with `pmap run --config`.
    """
    from pmap.calibrate import calibrate_samples, write_calibration
    from pmap.config import load_config

    config = _run_safely(load_config, config_path)
    calibration, method = _run_safely(calibrate_samples, samples, config, crs=crs)
    _run_safely(write_calibration, calibration, method, out, samples_path=samples,
                overwrite=overwrite)
    click.echo(f"CAUTION: {CAUTIONS_SHORT}", err=True)
    click.echo(f"wrote {out}: {calibration.n_pairs} pairs, fitted "
               f"{', '.join(calibration.fitted)}")
    click.echo(f"  cross-validated RMSE {calibration.cv_rmse:.3g} mg/kg, R^2 "
               f"{calibration.cv_r2:.2f} (default parameters: RMSE "
               f"{calibration.default_rmse:.3g} mg/kg)")
    for name in calibration.fitted:
        lo, hi = calibration.intervals[name]
        click.echo(f"  {name} = {calibration.estimates[name]:.4g} (95 % interval "
                   f"{lo:.4g} to {hi:.4g})")
    for name, reason in calibration.held.items():
        click.echo(f"  held {name}: {reason}")


@cli.command()
@click.argument("fields", type=click.Path(path_type=Path))
@click.option("--out", "-o", required=True, type=click.Path(path_type=Path, file_okay=False),
              help="Batch output directory: one folder per field, batch_summary.csv/.gpkg, "
              "index.html, and .batch/ (generated configs, logs).")
@click.option("--workers", "-j", type=click.IntRange(min=1),
              help="Local worker processes, one field each (default: the number of CPUs).")
@click.option("--scheduler", help="Run on a Dask cluster: its scheduler address, e.g. "
              "tcp://10.0.0.5:8786.")
@click.option("--scheduler-file", type=click.Path(path_type=Path, dir_okay=False),
              help="Run on a Dask cluster found through its scheduler file.")
@click.option("--dry-run", is_flag=True,
              help="List each field as new, changed (what changed) or done; write nothing.")
@click.option("--maps", type=click.Choice(["all", "overview", "none"]),
              help="Review pictures of every field (sets output.maps above every file).")
def batch(fields: Path, out: Path, workers: int | None, scheduler: str | None,
          scheduler_file: Path | None, dry_run: bool, maps: str | None) -> None:
    """Map many fields: FIELDS is a folder of field folders or a CSV/TOML table of fields.

    A field folder holds samples.*, boundary.* and optionally field.toml; batch.toml beside
    them holds the defaults (see docs/batch.md).  Fields whose previous output matches
    their inputs and configuration are skipped; a failing field is recorded and the
    others go on.

    Exit codes: 0 every field done or skipped; 1 at least one field failed (see
    batch_summary.csv; with --dry-run: a field cannot run); 2 bad command line, batch.toml
    or table; 3 FIELDS missing or holding no field; 4 another batch holds --out;
    130/143 stopped by SIGINT/SIGTERM (fields not finished are left unpublished).
    """
    from pmap.batch import FieldFormatter, run_batch

    if scheduler and scheduler_file:
        raise click.UsageError("--scheduler and --scheduler-file exclude each other")
    if workers is not None and (scheduler or scheduler_file):
        raise click.UsageError("--workers sets local processes; on a Dask cluster its "
                               "workers run the fields")
    for handler in logging.getLogger("pmap").handlers:  # pmap[<field>]: ... on every line
        handler.setFormatter(FieldFormatter())
    quiet = click.get_current_context().find_root().params.get("quiet")
    result = _run_safely(run_batch, fields, out, workers=workers, scheduler=scheduler,
                         scheduler_file=scheduler_file, dry_run=dry_run, maps=maps,
                         progress=not quiet)
    if dry_run:
        for line in result.plan.describe():
            click.echo(line)
        click.echo("dry run: nothing was written")
        sys.exit(result.exit_code)
    click.echo(f"CAUTION: {CAUTIONS_SHORT}", err=True)
    c = result.counts()
    if not quiet:
        for rec in result.records:
            if rec["status"] in ("failed", "cancelled"):
                click.echo(f"  {rec['name']}: {rec['status'].upper()}: {rec['error_type']}: "
                           f"{rec['error']}", err=True)
        click.echo(f"{len(result.records)} field(s): {c['done']} done, {c['skipped']} skipped, "
                   f"{c['failed']} failed" + (f", {c['cancelled']} cancelled"
                                              if c["cancelled"] else "")
                   + f"; summary {result.files.get('csv')}, index {result.files.get('index')}")
    if result.stopped:
        click.echo(f"pmap: stopped by {result.stopped}; run the same command again to finish "
                   "the batch", err=True)
    sys.exit(result.exit_code)


@cli.command()
@click.argument("samples", type=click.Path(path_type=Path, dir_okay=False))
@click.option("--boundary", "-b", required=True, type=click.Path(path_type=Path, dir_okay=False),
              help="The region's boundary: one or more polygons (dissolved into one region).")
@click.option("--out", "-o", required=True, type=click.Path(path_type=Path, file_okay=False),
              help="Output directory: rasters/<layer>.tif, summary.json, manifest.json.")
@click.option("--config", "-c", "config_path", type=click.Path(path_type=Path, dir_okay=False),
              help="TOML configuration (see docs/configuration.md).")
@click.option("--crs", help="CRS of projected x/y sample columns, e.g. EPSG:32616 (sets grid.crs).")
@click.option("--cell-size", type=float, help="Output cell size in metres (sets grid.cell_size_m).")
@click.option("--tile", "tile_cells", type=click.IntRange(min=16), default=512, show_default=True,
              help="Tile edge in cells; memory grows with its square.")
@click.option("--workers", "-j", type=click.IntRange(min=1),
              help="Local worker processes (default: the number of CPUs; 1 = this process).")
@click.option("--scheduler", help="Run the tiles on a Dask cluster: its scheduler address.")
@click.option("--overwrite", is_flag=True, help="Replace OUT if it is a previous pmap output.")
def region(samples: Path, boundary: Path, out: Path, config_path: Path | None, crs: str | None,
           cell_size: float | None, tile_cells: int, workers: int | None,
           scheduler: str | None, overwrite: bool) -> None:
    """Map a region too large for one grid in memory (a farm at 1 m), tile by tile.

    Writes the kriged properties with their variance and the soil model's pools and
    fixation risk as tiled GeoTIFFs; no rates (make those per field with `pmap run` or
    `pmap batch`).  The variograms are fitted once on all the samples.
    """
    from pmap.config import load_config
    from pmap.region import run_region

    if workers is not None and scheduler:
        raise click.UsageError("--workers sets local processes; on a Dask cluster its "
                               "workers run the tiles")
    config = _run_safely(load_config, config_path)
    changes = {k: v for k, v in {"crs": crs, "cell_size_m": cell_size}.items() if v is not None}
    if changes:
        config = _run_safely(config.replace, "grid", **changes)
    quiet = click.get_current_context().find_root().params.get("quiet")
    tty = sys.stderr.isatty()
    shown = [0]

    def progress(p) -> None:
        step = max(1, p.planned // 10)
        if quiet or not (tty or p.written % step == 0 or p.written == p.planned):
            return
        eta = f", about {p.eta_s / 60:.1f} min left" if p.eta_s is not None else ""
        line = f"pmap: region: {p.written}/{p.planned} tiles written{eta}"
        click.echo(("\r" + line.ljust(shown[0])) if tty else line, err=True,
                   nl=not tty or p.written == p.planned)
        shown[0] = len(line)

    result = _run_safely(run_region, samples, boundary, out, config, tile_cells=tile_cells,
                         workers=workers, scheduler=scheduler, overwrite=overwrite,
                         config_path=config_path, progress=progress)
    click.echo(f"CAUTION: {CAUTIONS_SHORT}", err=True)
    if quiet:
        return
    info = result.summary["region"]
    click.echo(f"wrote {len(result.outputs)} outputs to {out}")
    click.echo(f"  {info['width']:,} x {info['height']:,} cells of {info['cell_size_m']:g} m, "
               f"{info['cells_inside']:,} inside ({info['area_ha']:,.1f} ha), "
               f"{result.tiles} tiles")
    calibration = result.summary["soil_model"]["calibration"]
    if calibration.get("status") != "calibrated":
        click.echo("  soil model NOT CALIBRATED: its layers use the default parameters "
                   "(starting values, not a calibration for this region)")
    for name, fit in result.fits.items():
        cv = fit.cv
        click.echo(f"  {name:<15} {fit.model.kind:<11} cross-validation RMSE {cv.rmse:.3g}, "
                   f"MSDR {cv.msdr:.2f}")


@cli.command("config")
def config_reference() -> None:
    """Print every configuration key with its unit, default and source (Markdown)."""
    from pmap.config import configuration_reference

    click.echo(configuration_reference())


def main() -> None:
    """Entry point of the ``pmap`` console script and ``python -m pmap``."""
    cli(prog_name="pmap")
