"""lampyr: a render farm for small studios."""

import os as _os

__version__ = "0.1.0"

# numba's parallel kernels run on GNU OpenMP where TBB is not installed (numba's own choice of
# threading layer). Its threads, once a parallel loop ends, spin waiting for the next one, so
# between the loops of a render — the serial parts, writing a frame — the other cores burn time
# the process's own serial work and its neighbours could use. PASSIVE makes waiting threads
# sleep (the OpenMP API specification, environment variable OMP_WAIT_POLICY; GNU libgomp reads it
# when it loads, at the first parallel kernel). Measured (docs/farm.md, Speed): 400 parallel
# loops with 1 ms of serial work between them, 0.80 CPU s unset, 0.41 passive; the engine alone
# rendering demo frames on 2 cores, 3–25 % fewer CPU seconds in three pairs of runs. A value
# the user set is kept. (The Celery worker uses numba's workqueue layer: worker/app.py.)
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
