"""Command-line interface (thin: each command calls the public API)."""


def main(argv=None):  # placeholder replaced by the real entry point
    raise SystemExit("hierwork CLI is being built")
