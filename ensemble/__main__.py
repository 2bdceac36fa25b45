"""``python -m ensemble``: the same as the ``ensemble`` console script."""

from ensemble.cli import main

main()
