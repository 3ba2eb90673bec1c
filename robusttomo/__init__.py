"""robusttomo: SPAM-robust reconstruction of quantum gate error channels from random Clifford sequences."""

from robusttomo._version import __version__
from robusttomo.channels import Channel

__all__ = sorted(["Channel", "__version__"])
