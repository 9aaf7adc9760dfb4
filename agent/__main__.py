"""``python -m agent`` is the same as the ``skidvib`` command."""

from agent.cli import main

raise SystemExit(main())
