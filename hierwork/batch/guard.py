"""Process-group guard for one fit: ``python guard.py PARENT_PID COMMAND...``.

Run by file path (standard library only, nothing of hierwork is imported) as
the leader of a fresh session. It starts COMMAND in its own process group and
waits. When the process that started it dies, Linux sends it SIGTERM (parent
death signal, set by :func:`hierwork.batch.child.launch`); it then kills the
whole group: the fit *and* the chain processes the fit started, which would
otherwise sample on as orphans. Its exit status mirrors COMMAND's.
"""
import os
import signal
import subprocess
import sys


def _kill_group(signum, frame):
    os.killpg(0, signal.SIGKILL)


def main(argv: list[str]) -> int:
    parent, command = int(argv[0]), argv[1:]
    for signum in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
        signal.signal(signum, _kill_group)
    if os.getppid() != parent:  # the parent died before the death signal was armed
        return 1
    code = subprocess.call(command)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    os.killpg(0, signal.SIGTERM)  # anything the fit left in the group (its chains, if it was killed)
    if code < 0:  # mirror a death by signal (SIGKILL, e.g. from the out-of-memory killer, has no handler to reset)
        if -code not in (signal.SIGKILL, signal.SIGSTOP):
            signal.signal(-code, signal.SIG_DFL)
        os.kill(os.getpid(), -code)
    return code


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
