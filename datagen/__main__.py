"""Command line: ``python -m datagen OUT_DIR --units N --periods T [options]``.

``--scenario couriers --depots M`` writes the couriers-by-year panel instead (units are
couriers, periods years; ``--move-share`` of them change depot each year)."""

import argparse
import sys

from .build import generate, load_truth
from .couriers import generate_couriers
from .errors import DatagenError
from .options import COMPRESSIONS, ORDERS, Options


class _Parser(argparse.ArgumentParser):
    """Report usage errors as one sentence on stderr with exit code 2."""

    def error(self, message):
        self.exit(2, f"{self.prog}: {message}.\n")


def _parser():
    parser = _Parser(prog="python -m datagen",
                     description="Write a synthetic depot-by-month panel as Parquet files plus truth.json.")
    parser.add_argument("out_dir", help="folder to create")
    parser.add_argument("--units", type=int, required=True, help="number of depots")
    parser.add_argument("--periods", type=int, required=True, help="number of months")
    parser.add_argument("--seed", type=int, default=Options.seed)
    parser.add_argument("--unbalanced", type=float, default=Options.unbalanced,
                        help="share of depots that enter late or leave early")
    parser.add_argument("--gaps", type=float, default=Options.gaps,
                        help="share of depots with one month missing inside their span")
    parser.add_argument("--order", choices=ORDERS, default=Options.order,
                        help="sort rows by depot then month, or by month then depot")
    parser.add_argument("--rows-per-file", type=int, default=Options.rows_per_file)
    parser.add_argument("--row-group-size", type=int, default=Options.row_group_size)
    parser.add_argument("--compression", choices=COMPRESSIONS, default=Options.compression)
    parser.add_argument("--overwrite", action="store_true", help="replace OUT_DIR if it exists")
    parser.add_argument("--scenario", choices=("depots", "couriers"), default="depots",
                        help="depots by month (default), or couriers working for depots by year")
    parser.add_argument("--depots", type=int, help="couriers scenario: number of depots employing couriers")
    parser.add_argument("--move-share", type=float, default=0.1,
                        help="couriers scenario: share of couriers changing depot each year (default 0.1)")
    return parser


def main(argv=None):
    """Run the command line; return the exit code (0 done, 1 write failed, 2 bad usage)."""
    args = _parser().parse_args(argv)
    try:
        if args.scenario == "couriers":
            if args.depots is None:
                raise DatagenError("The couriers scenario needs --depots, the number of depots employing couriers.")
            out = generate_couriers(args.out_dir, args.units, args.depots, args.periods, seed=args.seed,
                                    move_share=args.move_share, rows_per_file=args.rows_per_file,
                                    row_group_size=args.row_group_size, compression=args.compression,
                                    overwrite=args.overwrite)
        else:
            out = generate(args.out_dir, args.units, args.periods, seed=args.seed, unbalanced=args.unbalanced,
                           gaps=args.gaps, order=args.order, rows_per_file=args.rows_per_file,
                           row_group_size=args.row_group_size, compression=args.compression,
                           overwrite=args.overwrite)
    except DatagenError as exc:
        print(exc, file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"Could not write {args.out_dir}: {exc.strerror or exc}. Check the path and free space.",
              file=sys.stderr)
        return 1
    truth = load_truth(out)
    n_files = len(truth["files"])
    print(f"{out}: {truth['n_rows']} rows in {n_files} Parquet file{'s' if n_files > 1 else ''}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
