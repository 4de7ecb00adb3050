"""Real-time scheduling for the control path: SCHED_FIFO per thread and locked memory (Linux).

Why per thread: on Linux the scheduling policy is an attribute of each thread, and
sched_setscheduler(2) takes a thread id (``pid`` 0 = the calling thread), so the threads that
carry the control path (the one that runs the tick, the transport's receive threads) can run
SCHED_FIFO while the rest of the process (services, parameters, status, logging) keeps normal
scheduling and cannot hold up a tick by priority. Why mlockall: a page fault on the tick path
(memory swapped out or not yet mapped) stalls it for far longer than a tick;
MCL_CURRENT | MCL_FUTURE keeps every page of the process resident.

Permission: root or CAP_SYS_NICE, or an `rtprio` limit (RLIMIT_RTPRIO, limits.conf) >= the
priority; mlockall needs CAP_IPC_LOCK or a `memlock` limit (RLIMIT_MEMLOCK) above the
process's size. Where either is refused the process runs on with normal scheduling and says
so; nothing here raises.

Middleware-free: the node decides which threads belong to the control path.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import errno
import os
import resource
import threading
from dataclasses import dataclass, field

#: <sys/mman.h> on Linux
MCL_CURRENT = 1
MCL_FUTURE = 2
PRIORITY_RANGE = (1, 99)        # sched_get_priority_min/max(SCHED_FIFO) on Linux
_GONE = 'the thread has ended'


def check_priority(priority: int) -> str | None:
    """None if ``priority`` is a SCHED_FIFO priority, else why not."""
    low, high = PRIORITY_RANGE
    if isinstance(priority, bool) or not isinstance(priority, int) or not low <= priority <= high:
        return f'a real-time priority is an integer from {low} to {high}, got {priority!r}'
    return None


def _reason(err: OSError) -> str:
    if err.errno == errno.EPERM:
        return ('not permitted (needs root, CAP_SYS_NICE or an rtprio limit >= the priority; '
                f'RLIMIT_RTPRIO is {resource.getrlimit(resource.RLIMIT_RTPRIO)[0]})')
    return os.strerror(err.errno or 0) or str(err)


def set_fifo(priority: int, tid: int = 0) -> str | None:
    """SCHED_FIFO at ``priority`` for thread ``tid`` (0: the calling thread). None on success,
    else why it was refused (the thread keeps its scheduling)."""
    problem = check_priority(priority)
    if problem:
        return problem
    if not hasattr(os, 'sched_setscheduler'):
        return 'this platform has no sched_setscheduler (Linux only)'
    try:
        os.sched_setscheduler(tid, os.SCHED_FIFO, os.sched_param(priority))
    except ProcessLookupError:
        return _GONE
    except OSError as err:
        return _reason(err)
    return None


def is_fifo(tid: int = 0) -> bool:
    """True when thread ``tid`` (0: the calling thread) runs SCHED_FIFO."""
    try:
        return os.sched_getscheduler(tid) == os.SCHED_FIFO
    except (OSError, AttributeError):
        return False


def lock_memory() -> str | None:
    """mlockall(MCL_CURRENT | MCL_FUTURE). None on success, else why it was refused."""
    name = ctypes.util.find_library('c')
    try:
        libc = ctypes.CDLL(name, use_errno=True)
        result = libc.mlockall(MCL_CURRENT | MCL_FUTURE)
    except (OSError, AttributeError) as err:
        return f'mlockall unavailable: {err}'
    if result != 0:
        code = ctypes.get_errno()
        if code in (errno.EPERM, errno.ENOMEM):
            soft = resource.getrlimit(resource.RLIMIT_MEMLOCK)[0]
            limit = 'unlimited' if soft == resource.RLIM_INFINITY else f'{soft // 1024} KiB'
            return (f'mlockall refused ({os.strerror(code)}; needs CAP_IPC_LOCK or a memlock '
                    f'limit above the process size, RLIMIT_MEMLOCK is {limit})')
        return f'mlockall failed: {os.strerror(code)}'
    return None


def threads_named(prefixes: tuple[str, ...]) -> dict[int, str]:
    """{native thread id: name} of this process's threads whose name (/proc/self/task/*/comm,
    as pthread_setname_np set it) starts with one of ``prefixes``."""
    found: dict[int, str] = {}
    try:
        tids = os.listdir('/proc/self/task')
    except OSError:
        return found
    for tid in tids:
        try:
            with open(f'/proc/self/task/{tid}/comm', encoding='utf-8', errors='replace') as f:
                name = f.read().strip()
        except OSError:
            continue
        if name.startswith(prefixes):
            found[int(tid)] = name
    return found


@dataclass
class RealtimeControl:
    """SCHED_FIFO for the threads of a control path, granted once per thread.

    ``enter()`` is called on the control path itself (cheap after the first call in a thread:
    one set lookup); the first call in each thread asks for SCHED_FIFO and records the outcome.
    Once refused, it stops asking (the first refusal is the one reported).
    """

    priority: int
    granted: dict[int, str] = field(default_factory=dict)    # tid -> thread name
    refused: str | None = None
    memory: str = 'not asked'
    _seen: set[int] = field(default_factory=set)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def start(self, extra_threads: dict[int, str] | None = None) -> str:
        """Lock memory and promote ``extra_threads`` (e.g. a transport's receive threads);
        returns the line to log."""
        problem = lock_memory()
        self.memory = 'locked (mlockall MCL_CURRENT | MCL_FUTURE)' if problem is None else problem
        for tid, name in (extra_threads or {}).items():
            self._promote(tid, name, own=False)
        return self.summary()

    def enter(self, below: int = 0) -> str | None:
        """On a control-path thread: the first call in each thread asks for SCHED_FIFO
        (``below`` steps under the priority, at least 1) and returns the line to log (granted,
        or the first refusal); later calls return None after one set lookup."""
        tid = threading.get_native_id()
        if tid in self._seen:
            return None
        name = threading.current_thread().name
        refused_before = self.refused
        priority = max(PRIORITY_RANGE[0], self.priority - below)
        if self._promote(tid, name, own=True, priority=priority):
            return f'SCHED_FIFO {priority} for thread {name} ({tid})'
        if self.refused is not None and refused_before is None:
            return self.summary()
        return None

    def _promote(self, tid: int, name: str, *, own: bool, priority: int | None = None) -> bool:
        with self._lock:
            if tid in self._seen:
                return False
            self._seen.add(tid)
            if self.refused is not None:
                return False
            priority = self.priority if priority is None else priority
            problem = set_fifo(priority, 0 if own else tid)
            if problem == _GONE:
                return False
            if problem is not None:
                self.refused = problem
                return False
            self.granted[tid] = name if priority == self.priority else f'{name} at {priority}'
            return True

    def summary(self) -> str:
        """What was granted, in one line (for the log)."""
        threads = ', '.join(f'{name} ({tid})' for tid, name in self.granted.items()) or 'none yet'
        if self.refused is not None and not self.granted:
            sched = (f'SCHED_FIFO {self.priority} refused: {self.refused}; running with normal '
                     'scheduling')
        elif self.refused is not None:
            sched = (f'SCHED_FIFO {self.priority} for {threads}; refused for later threads: '
                     f'{self.refused}')
        else:
            sched = f'SCHED_FIFO {self.priority} for {threads}'
        return f'{sched}; memory {self.memory}'

    def as_dict(self) -> dict[str, object]:
        return {'priority': self.priority,
                'threads': {name: tid for tid, name in self.granted.items()},
                'refused': self.refused, 'memory': self.memory}


__all__ = ['PRIORITY_RANGE', 'RealtimeControl', 'check_priority', 'is_fifo', 'lock_memory',
           'set_fifo', 'threads_named']
