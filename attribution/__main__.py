"""``python -m attribution`` is the same as the ``tiltaudit`` command."""

from attribution.entry import main

main()
