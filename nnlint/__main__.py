"""python -m nnlint."""
from nnlint.cli import main

raise SystemExit(main())
