"""Research comparison of inversion methods on synthetic drives.

The public names of the submodules, gathered here for notebooks: ``synthetic`` (drives, records,
contact from a profile), ``axisym``, ``region3d`` and ``cartesian`` (one method each) and
``compare`` (several methods, one table).
"""

from tbminv.studies.methods.axisym import *  # noqa: F403
from tbminv.studies.methods.cartesian import *  # noqa: F403
from tbminv.studies.methods.compare import *  # noqa: F403
from tbminv.studies.methods.region3d import *  # noqa: F403
from tbminv.studies.methods.synthetic import *  # noqa: F403
