"""skidvib: an unattended vibration monitoring agent for one machine.

Importing ``agent`` is cheap on purpose: it holds the version only.
"""

__version__ = "0.1.0"
