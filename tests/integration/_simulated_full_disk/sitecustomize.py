"""Test fixture (tests/integration/test_worker_faults.py), loaded only by
processes started with this folder on PYTHONPATH: while the file named by
$WAVESWEEP_TEST_DISK_FULL_FLAG exists, every density snapshot a result
writer writes fails with ENOSPC, as on a disk that filled.  Used where a
size-limited tmpfs cannot be mounted."""
import errno
import os

_flag = os.environ.get("WAVESWEEP_TEST_DISK_FULL_FLAG")
if _flag:
    from wavesweep.io import recorder as _recorder

    _original = _recorder.ResultWriter.add_snapshot

    def add_snapshot(self, *args, **kwargs):
        if os.path.exists(_flag):
            with self._room(self._frame_bytes()):
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self.tmp))
        return _original(self, *args, **kwargs)

    _recorder.ResultWriter.add_snapshot = add_snapshot
