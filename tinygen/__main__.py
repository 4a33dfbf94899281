"""`python -m tinygen`: the command line, as the `tinygen` console script runs it."""
import sys

try:
    from tinygen.cli import main
except KeyboardInterrupt:  # interrupted while still importing: one line all the same
    print("tinygen: interrupted (SIGINT)", file=sys.stderr)
    raise SystemExit(130) from None

raise SystemExit(main())
