"""What can go wrong with an output file: one-line errors (exit code 2 on the command line)."""


class StoreError(Exception):
    """An output file that cannot be used as asked (one line, exit code 2 on the command line).

    ``foreign`` is true when the file exists but belongs to something else (another run,
    schema or package version, or not a store at all): ``force`` would replace it."""

    def __init__(self, message, foreign=False):
        super().__init__(message)
        self.foreign = foreign


class DamagedStore(StoreError):
    """A file that looks like a store but whose HDF5 structure or attributes cannot be
    trusted (a truncated file, flipped bits in its metadata). ``recoverable`` counts the
    chunks its recovery map still vouches for (None: no usable map)."""

    def __init__(self, message, recoverable=None):
        super().__init__(message, foreign=True)
        self.recoverable = recoverable


class StoreBusy(StoreError):
    """Another process holds the output's lock (it is writing the file)."""


class StoreWriteError(StoreError):
    """A write to the store failed (full disk, I/O error): nothing written before is lost."""
