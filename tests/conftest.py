"""Suite-wide settings: hypothesis keeps its files out of the working directory, in a temporary folder that is
removed when the run ends."""

import atexit
import shutil
import tempfile

from hypothesis import configuration

HYPOTHESIS_HOME = tempfile.mkdtemp(prefix="danpack-hypothesis-")
configuration.set_hypothesis_home_dir(HYPOTHESIS_HOME)
atexit.register(shutil.rmtree, HYPOTHESIS_HOME, ignore_errors=True)
