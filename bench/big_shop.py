"""A big order export in the demo shop's scenario: Fernhollow Plants with 60,000 customers.

The demo shop's generator (``demo_data/make_demo_shop.py``) is run with more customers
and a higher chance of coming back after each order, so that the export holds about
300,000 orders from about 60,000 customers (about 640,000 order lines, 42 MB): the size
of shop the dashboard's browser benchmark (``bench/browser_pages.py``) is measured on.
Everything else (products, prices, seasons, refunds, cancelled and test orders, the
duplicate and the broken row, money written as text) is the demo shop's.

Run from the repository root::

    python bench/big_shop.py                      # writes bench/data/plant_shop_60k.csv
    python bench/big_shop.py --out /tmp/big.csv
    python bench/big_shop.py --customers 102000 --out bench/data/plant_shop_lines_102000.csv
                                                  # about 1.09 million order lines

The output depends only on the seed. Files are cached in ``bench/data/`` (not committed).
"""

from __future__ import annotations

import argparse
import importlib.util
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DEFAULT_OUT = HERE / "data" / "plant_shop_60k.csv"
SEED = 60_000

#: Customers arriving over the two years (some never order before the export ends: about 59,850 remain).
CUSTOMERS = 60_000
#: Chance of coming back after each order: Beta(5.5, 1) across private customers (mean 0.85), against the
#: demo shop's Beta(1.5, 1); with it the export holds about 5 orders per customer, 300,000 in all.
RETURN_BETA = (5.5, 1.0)


def _demo_generator():
    """The demo shop's generator as a module of its own (so that changing its settings changes no one else's)."""
    spec = importlib.util.spec_from_file_location("big_shop_generator", ROOT / "demo_data" / "make_demo_shop.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def write_big_shop(path: Path = DEFAULT_OUT, *, customers: int = CUSTOMERS, seed: int = SEED) -> dict:
    """Write the export to ``path`` (folders made as needed) and return the generator's summary."""
    generator = _demo_generator()
    generator.N_CUSTOMERS = customers
    generator.RETAIL_RETURN_BETA = RETURN_BETA
    export = generator.make_order_lines(seed=seed)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(generator.render_csv(export).encode("utf-8"))
    return generator.summarise(export)


def big_shop_file(path: Path = DEFAULT_OUT) -> Path:
    """The export, written first when it is not there yet."""
    path = Path(path)
    if not path.exists():
        write_big_shop(path)
    return path


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="where to write the CSV")
    parser.add_argument("--customers", type=int, default=CUSTOMERS,
                        help=f"customers arriving over the two years (default {CUSTOMERS:,})")
    args = parser.parse_args(argv)
    summary = write_big_shop(args.out, customers=args.customers)
    print(f"wrote {args.out}: {summary['rows']:,} rows, {summary['orders']:,} orders, "
          f"{summary['customers']:,} customers")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
