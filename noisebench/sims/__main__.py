"""``python -m noisebench.sims``: serve the simulated bench over SCPI (see ``serve.py``)."""

import sys

from .serve import main

sys.exit(main())
