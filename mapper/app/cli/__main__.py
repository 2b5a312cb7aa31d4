"""``python -m mapper.app.cli``: the same as the ``mapper`` command."""

from mapper.app.cli import main

main()
