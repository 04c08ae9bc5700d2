"""lampyr: a render farm for small studios."""

__version__ = "0.1.0"
