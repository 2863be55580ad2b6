"""``fanmap batch SOURCE``: analyse a whole archive of maps, in parallel, resumably."""

import sys
from pathlib import Path

from .._cautions import CAUTIONS
from ..archive import find_maps, jobs_for_paths, map_settings, run_batch
from ..errors import InputError
from ..materials import MATERIAL_NAMES
from ._options import add_reading_options, dielectric_prior, reading_kwargs

HELP = "analyse every map of an archive folder, glob or workflow file into one results table"

#: Options that set analysis settings; with a workflow file they belong in the file.
_SETTING_OPTIONS = ("material", "dielectric_thickness", "permittivity", "gate_range",
                    "field_range", "gate_limits", "no_figures", "no_summary", "analyses")


def register(subparsers):
    parser = subparsers.add_parser(
        "batch", help=HELP, description=HELP + ". Progress goes to the terminal; the table, "
        "per-map results and a summary figure go to --out.",
        epilog="Resuming: rerun the same command with --resume after an interruption; maps whose "
               "file content and settings already have a result are not analysed again. "
               "Workflow files: see workflows/ for examples.")
    parser.add_argument("source", metavar="SOURCE",
                        help="archive folder (searched recursively), quoted glob, or workflow .toml file")
    parser.add_argument("--workers", type=int, default=None, metavar="N",
                        help="worker processes of the local dask cluster (default: the cores available; "
                             "0: analyse in this process, one map after the other)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="use a running dask scheduler (tcp://HOST:PORT) instead of a local cluster; "
                             "its workers must see the maps and --out under the same paths (start them "
                             "with DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED=False: dask's profiler "
                             "slows each fit by 15-40 %%)")
    parser.add_argument("--out", type=Path, metavar="DIR",
                        help="output folder (default: the workflow's [outputs] directory, "
                             "else ./fanmap-batch)")
    parser.add_argument("--resume", action="store_true",
                        help="skip maps that already have a result for the same content and settings")
    parser.add_argument("--retry-failed", action="store_true",
                        help="with --resume, analyse maps that failed before again")
    parser.add_argument("--in-flight", type=int, metavar="N",
                        help="maps sent to workers at once (default: twice the worker threads)")
    settings = parser.add_argument_group("analysis settings (folder or glob sources only)")
    settings.add_argument("--material", choices=MATERIAL_NAMES, help="material preset (default: auto)")
    settings.add_argument("--dielectric-thickness", type=float, metavar="NM",
                          help="gate dielectric thickness prior, in nm (with --permittivity)")
    settings.add_argument("--permittivity", type=float, metavar="EPS_R",
                          help="relative permittivity of the gate dielectric")
    settings.add_argument("--gate-range", type=float, nargs=2, metavar=("LOW", "HIGH"),
                          help="analyse only this part of the gate axis of fan maps, in V")
    settings.add_argument("--field-range", type=float, nargs=2, metavar=("LOW", "HIGH"),
                          help="analyse only this part of the field axis of fan maps, in T")
    settings.add_argument("--gate-limits", type=float, nargs=2, metavar=("LOW", "HIGH"),
                          help="the device's allowed gate sweep, in V: maps beyond it are flagged "
                               "(fanmap sets no limit; follow your lab's rules)")
    settings.add_argument("--analyses", metavar="LIST",
                          help="comma-separated analyses to run: fan,gates,crosschecks (default: all)")
    settings.add_argument("--no-figures", action="store_true",
                          help="write per-map result JSON only (no figures or report pages)")
    settings.add_argument("--no-summary", action="store_true", help="do not draw the summary figure")
    add_reading_options(parser)
    parser.set_defaults(run=run)
    return parser


def _settings_from_args(args):
    prior = dielectric_prior(args)
    dielectric = None if prior is None else {"thickness": prior[0], "permittivity": prior[1]}
    for name in ("gate_range", "field_range", "gate_limits"):
        limits = getattr(args, name)
        if limits is not None and not limits[0] < limits[1]:
            raise InputError(f"--{name.replace('_', '-')} needs LOW < HIGH, got {limits[0]:g} {limits[1]:g}")
    analyses = None
    if args.analyses:
        chosen = {a.strip() for a in args.analyses.split(",") if a.strip()}
        unknown = chosen - {"fan", "gates", "crosschecks"}
        if unknown or not chosen:
            raise InputError(f"--analyses takes fan, gates, crosschecks; got {args.analyses!r}")
        analyses = {name: name in chosen for name in ("fan", "gates", "crosschecks")}
    return map_settings(material=args.material or "auto", dielectric=dielectric, reading=_reading(args),
                        gate_range=args.gate_range, field_range=args.field_range,
                        gate_limits=args.gate_limits, analyses=analyses, figures=not args.no_figures)


def _reading(args):
    """The reading options given on the command line (unset ones left out, so they hash alike)."""
    return {key: value for key, value in reading_kwargs(args).items() if value not in (None, {}, [])}


def _workflow_jobs(args):
    from ..workflow import load_workflow

    given = [name for name in _SETTING_OPTIONS if getattr(args, name) not in (None, False)]
    given += [f"{name} (reading option)" for name in _reading(args)]
    if given:
        raise InputError(f"{', '.join('--' + g.replace('_', '-') for g in given)}: with a workflow file, "
                         f"put analysis settings in the file ([defaults] or [[devices]])")
    workflow = load_workflow(args.source)
    root = workflow.path.resolve().parent
    jobs = []
    for device in workflow.devices:
        s = device.settings
        options = {key: value for key, value in s.items() if key not in ("material", "reading")}
        settings = map_settings(material=s["material"], reading=s["reading"], analyses=workflow.analyses,
                                device=device.name, cooldown=device.cooldown, figures=workflow.figures,
                                **options)
        jobs.extend(jobs_for_paths(device.maps, root, settings))
    return jobs, args.out or workflow.output_directory, workflow.summary, workflow.name


def run(args):
    if args.workers is not None and args.workers < 0:
        raise InputError("--workers must be 0 (no dask) or a positive number")
    if args.workers is not None and args.scheduler:
        raise InputError("--workers sizes the local cluster; with --scheduler the scheduler's workers are used")
    if args.retry_failed and not args.resume:
        raise InputError("--retry-failed only makes sense with --resume")
    if args.in_flight is not None and args.in_flight < 1:
        raise InputError("--in-flight must be at least 1")
    if str(args.source).endswith(".toml"):
        jobs, out_dir, summary, title = _workflow_jobs(args)
    else:
        out_dir = args.out or Path("fanmap-batch")
        root, maps = find_maps(args.source, exclude=[out_dir])
        jobs = jobs_for_paths(maps, root, _settings_from_args(args))
        summary, title = not args.no_summary, f"fanmap batch of {args.source}"
    print(f"fanmap batch: {len(jobs)} maps -> {out_dir}", file=sys.stderr)
    print(f"note: {CAUTIONS[0]}", file=sys.stderr)
    try:
        outcome = run_batch(jobs, out_dir, workers=args.workers, scheduler=args.scheduler,
                            resume=args.resume, retry_failed=args.retry_failed,
                            max_in_flight=args.in_flight, summary=summary, title=title)
    except KeyboardInterrupt:
        print(f"\nfanmap batch: stopped; every finished map is kept in {out_dir}/records. "
              f"Run the same command with --resume to continue.", file=sys.stderr)
        raise
    print(f"{outcome.maps} maps: {outcome.maps - outcome.failed} ok, {outcome.failed} failed "
          f"({outcome.analysed} analysed now, {outcome.resumed} from earlier runs) in "
          f"{outcome.elapsed:.1f} s", file=sys.stderr)
    for name, path in outcome.outputs.items():
        print(f"  {name}: {path}")
    if outcome.failed:
        print(f"  failed maps are listed with their error in {outcome.outputs['table_csv']} "
              f"(status column)", file=sys.stderr)
    return 0
