"""``python -m attribution`` is the same as the ``tiltaudit`` command."""

from attribution.cli import main

main(prog_name="tiltaudit")
