"""The ``clusterlab`` command: a thin layer over the library.

Subcommands
-----------
``inspect``  describe a film (molecules, box, charges)
``presets``  list the method presets
``run``      run a study from a TOML study file (every key overridable by a flag)
``report``   statistics and plots of an existing result store
``export``   site and pair tables for transport models from a store
``demo``     the demo study on the bundled film, end to end
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from typing import Any, Sequence

from .errors import ClusterlabError

EPILOG = ("Results are model estimates (point-charge embedded DFT/TDA): see the report's notes on what "
          "each model leaves out.")


def _add_study_flags(p: argparse.ArgumentParser) -> None:
    from .studyfile import SCHEMA

    for section, keys in SCHEMA.items():
        g = p.add_argument_group(f"[{section}] settings (override the study file)")
        for key, s in keys.items():
            choices = f" {{{', '.join(map(str, s.choices))}}}" if s.choices else ""
            default = "" if s.default is None else f" (default {s.default!r})"
            g.add_argument(f"--{section}-{key.replace('_', '-')}", dest=f"set__{section}__{key}", metavar="VALUE",
                           help=f"{s.help}{choices}{default}")


def _overrides(args: argparse.Namespace) -> dict[tuple[str, str], Any]:
    from .studyfile import parse_override

    out = {}
    for name, value in vars(args).items():
        if name.startswith("set__") and value is not None:
            _, section, key = name.split("__", 2)
            out[(section, key)] = parse_override(section, key, value)
    return out


def _add_choice_flags(p: argparse.ArgumentParser) -> None:
    p.add_argument("--film-id", help="film content id to read when the store holds several (leading part enough)")
    p.add_argument("--method-key", help="method key to read when the store holds several (leading part enough)")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="clusterlab", description=__doc__.split("\n\n")[0], epilog=EPILOG,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="store_true", help="print the version and exit")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    q = sub.add_parser("inspect", help="describe a film", description="Describe a film: molecules, box, charges.")
    q.add_argument("topology")
    q.add_argument("trajectory", nargs="*")
    q.add_argument("--charges", help="CSV charge table (resname,name,charge)")

    sub.add_parser("presets", help="list the method presets")

    r = sub.add_parser("run", help="run a study from a TOML study file", epilog=EPILOG,
                       description="Run a study described by a TOML file (see clusterlab.studyfile). "
                                   "Sections present in the file run in the order scan, sample, model, "
                                   "export; every key can be overridden by the flags below.")
    r.add_argument("study", help="TOML study file")
    r.add_argument("--quiet", action="store_true", help="no progress bars")
    _add_study_flags(r)

    rp = sub.add_parser("report", help="statistics and plots of a result store")
    rp.add_argument("store", help="SQLite result store of a study")
    rp.add_argument("--out", default="report", help="report folder (default: report)")
    rp.add_argument("--quantity", action="append", help="column to report (repeatable; default S1_eV, T1_eV, "
                    "S1_shift_eV)")
    _add_choice_flags(rp)
    hg = rp.add_argument_group("host:guest section (needs the film: by default rebuilt from the files the "
                               "store's records name)")
    hg.add_argument("--topology", help="film topology, when the recorded film files moved")
    hg.add_argument("--trajectory", nargs="*", default=[], help="film trajectory file(s), with --topology")
    hg.add_argument("--charges", help="CSV charge table (resname,name,charge), with --topology")
    hg.add_argument("--torsion", action="append", help="donor-acceptor torsion 'SPECIES: A B C D' by four atom "
                    "names (repeatable, one per species; default: the study's [doped] torsion kept in the store)")
    hg.add_argument("--neighbour-cutoff", type=float, help="host-neighbour distance of the triplet confinement "
                    "(Å; default: the study's, else 9)")

    ex = sub.add_parser("export", help="site and pair tables for transport models from a store")
    ex.add_argument("store")
    ex.add_argument("--topology", required=True, help="film topology (the pair table needs the geometry)")
    ex.add_argument("--trajectory", nargs="*", default=[])
    ex.add_argument("--charges")
    ex.add_argument("--out", default="export")
    ex.add_argument("--cutoff", type=float, default=8.0, help="pair cutoff in Å (default 8)")
    ex.add_argument("--criterion", choices=("centroid", "atom"), default="centroid")
    _add_choice_flags(ex)

    d = sub.add_parser("demo", help="run the demo study on the bundled film", epilog=EPILOG,
                       description="Radius scan, site-energy sample with disorder statistics, film-wide "
                                   "electrostatic model and export on demo_traj/, with a report folder; "
                                   "at the end, what each stage cost (wall and CPU time, calculations run "
                                   "and taken from the store).")
    d.add_argument("--out", default="demo_report", help="report folder (default: demo_report)")
    d.add_argument("--quick", action="store_true",
                   help="a smaller demo: 2 radii, 2 sites, the model on one frame with one conformer reference")
    d.add_argument("--workers", type=int, default=None, help="worker processes (default: one per core)")
    d.add_argument("--quiet", action="store_true")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    p = _parser()
    args = p.parse_args(argv)
    if args.version:
        from .versions import __version__

        print(__version__)
        return 0
    if not args.command:
        p.print_help()
        return 2
    try:
        with warnings.catch_warnings():
            if args.command != "run":
                warnings.simplefilter("ignore")
            return _dispatch(args)
    except ClusterlabError as exc:
        print(f"clusterlab {args.command}: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("interrupted; finished results are kept in the store, re-run to resume", file=sys.stderr)
        return 130


def _dispatch(args: argparse.Namespace) -> int:
    if args.command == "inspect":
        from .film import load_film

        film = load_film(args.topology, args.trajectory or None, charges=args.charges)
        print(film.describe())
        return 0
    if args.command == "presets":
        from .qm.method import Method

        for name, text in Method.presets().items():
            print(f"{name:14s} {text}")
        return 0
    if args.command == "run":
        from .pipeline import run_study
        from .studyfile import load_study

        study = load_study(args.study, _overrides(args))
        outcome = run_study(study, progress=not args.quiet)
        if outcome.all_failed:
            print(f"clusterlab run: error: every one of the {outcome.sample.report.n_tasks} site calculations "
                  f"failed; first: {outcome.sample.failures[0] if outcome.sample.failures else 'unknown'}",
                  file=sys.stderr)
            return 1
        return 0
    if args.command == "report":
        return _report(args)
    if args.command == "export":
        from .film import load_film
        from .study.sample import SiteSample
        from .export import export_study

        film = load_film(args.topology, args.trajectory or None, charges=args.charges)
        sample = SiteSample.from_store(args.store, film=film, film_id=args.film_id, method_key=args.method_key)
        paths = export_study(film, args.out, sample=sample, cutoff_A=args.cutoff, criterion=args.criterion)
        for k, v in paths.items():
            print(f"{k}: {v}")
        return 0
    if args.command == "demo":
        from .demo import run_demo

        run_demo(args.out, quick=args.quick, workers=args.workers, progress=not args.quiet)
        return 0
    raise ClusterlabError(f"unknown command {args.command!r}")  # pragma: no cover


def _report(args: argparse.Namespace) -> int:
    """``clusterlab report``: the sample's statistics, and the host:guest section when the film is found."""
    from .errors import InputError
    from .pipeline import DOPED_META_KEY
    from .report import ReportWriter, doped_section, film_missing_section, report_inputs, sample_section
    from .store import ResultStore
    from .studyfile import parse_torsion_names

    if (args.trajectory or args.charges) and not args.topology:
        raise InputError("--trajectory and --charges describe the film together with --topology; add --topology.")
    torsion = parse_torsion_names(args.torsion) if args.torsion else None
    if not os.path.exists(args.store):
        raise InputError(f"result store {args.store!r} not found.")
    with ResultStore(args.store, readonly=True) as st:
        film = None
        if args.topology:
            from .film import load_film

            film = load_film(args.topology, args.trajectory or None, charges=args.charges)
        sample, film, why = report_inputs(st, film=film, film_id=args.film_id, method_key=args.method_key)
        recorded = dict(st.meta.get(DOPED_META_KEY, {}))
        rep = ReportWriter(args.out, f"clusterlab report of {os.path.basename(args.store)}")
        stats = sample_section(rep, sample, args.quantity or ["S1_eV", "T1_eV", "S1_shift_eV"])
        if len(stats):
            from .labels import MAX_COLUMNS, display_table

            print(display_table(stats, max_columns=MAX_COLUMNS).to_string(index=False))
        if film is None:
            film_missing_section(rep, sample, why)
            print(f"host:guest section left out: {why}; pass --topology (and --trajectory, --charges) to give "
                  "the film.")
        else:
            ov = doped_section(rep, film, sample, states=st, torsion_atoms=torsion or recorded.get("torsion"),
                               cutoff_A=args.neighbour_cutoff if args.neighbour_cutoff is not None
                               else recorded.get("neighbour_cutoff_A"))
            if ov is not None:
                print(f"host:guest section: host {ov.species.host}, guest {ov.species.guest}"
                      + (f" ({'; '.join(ov.notes)})" if ov.notes else ""))
        print(f"report: {rep.write()}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
