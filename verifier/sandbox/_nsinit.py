"""The trusted init of the namespace sandbox: builds the sandbox, runs the command in it, brings results back.

Started by :mod:`verifier.sandbox.namespace` as ``python -I -S -c BOOT <package parent> <config.json>``.
Two processes of it take part, both trusted:

* the *outer* one unshares user, mount, PID, network, IPC, UTS and cgroup namespaces, gets the uid/gid
  maps written, forks the inner one and waits for it; on SIGTERM it SIGKILLs the inner one, and since the
  inner one is PID 1 of the new PID namespace the kernel then kills every process in it, and the outer
  one's wait returns only once they are all gone;
* the *inner* one (PID 1) builds a minimal root on tmpfs, copies the tree into the workspace, pivots into
  the new root, forks and execs the untrusted command without capabilities, reaps everything, then copies
  the collected files out through a folder fd it opened before the pivot and never mounted in the new root.

Only the standard library (and :mod:`verifier.sandbox.common`, which uses only that) is imported, so that
nothing of the sandboxed interpreter's site-packages runs in the trusted part.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import fcntl
import json
import os
import platform
import resource
import select
import shutil
import signal
import socket
import struct
import sys
import traceback
from pathlib import Path
from typing import Any, NamedTuple

from verifier.models import Limits
from verifier.sandbox import common

# From <linux/sched.h>, <sys/mount.h>, <linux/prctl.h>, <linux/securebits.h>, <linux/mount.h>.
CLONE_NEWNS, CLONE_NEWCGROUP, CLONE_NEWUTS, CLONE_NEWIPC = 0x00020000, 0x02000000, 0x04000000, 0x08000000
CLONE_NEWUSER, CLONE_NEWPID, CLONE_NEWNET = 0x10000000, 0x20000000, 0x40000000
NAMESPACES = CLONE_NEWUSER | CLONE_NEWNS | CLONE_NEWPID | CLONE_NEWNET | CLONE_NEWIPC | CLONE_NEWUTS | CLONE_NEWCGROUP
MS_RDONLY, MS_NOSUID, MS_NODEV, MS_NOEXEC = 1, 2, 4, 8
MS_REMOUNT, MS_BIND, MS_REC, MS_PRIVATE = 32, 4096, 16384, 1 << 18
MNT_DETACH = 2
AT_FDCWD, AT_RECURSIVE = -100, 0x8000
MOUNT_ATTR_RDONLY, MOUNT_ATTR_NOSUID, MOUNT_ATTR_NODEV = 1, 2, 4
PR_SET_DUMPABLE, PR_CAPBSET_DROP, PR_SET_SECUREBITS, PR_SET_NO_NEW_PRIVS = 4, 24, 28, 38
PR_CAP_AMBIENT, PR_CAP_AMBIENT_CLEAR_ALL = 47, 4
# noroot + locked, setuid fixup kept on and locked, keep-caps off and locked, no ambient raise + locked
SECUREBITS = 0b11101011
SYS_PIVOT_ROOT = {"x86_64": 155, "aarch64": 41, "riscv64": 41, "ppc64le": 203, "s390x": 217}
SYS_MOUNT_SETATTR = 442  # the same number on every architecture (added after the syscall tables merged)
SIOCGIFFLAGS, SIOCSIFFLAGS, IFF_UP = 0x8913, 0x8914, 0x1
PR_SET_SECCOMP, SECCOMP_MODE_FILTER = 22, 2
# Classic BPF (<linux/filter.h>, <linux/seccomp.h>): the syscall number is at offset 0 of seccomp_data,
# the audit architecture at 4, the low word of the first argument at 16 (little-endian machines).
BPF_LD_W_ABS, BPF_JEQ_K, BPF_JSET_K, BPF_JGE_K, BPF_RET_K = 0x20, 0x15, 0x45, 0x35, 0x06
SECCOMP_RET_ALLOW, SECCOMP_RET_ERRNO = 0x7FFF0000, 0x00050000
X32_SYSCALL_BIT = 0x40000000
# Per architecture: its audit id and the syscall numbers the filter names (from <asm/unistd.h>; the
# x86_64 ones checked against this machine's headers, the aarch64 ones from the generic table, from memory).


class SyscallTable(NamedTuple):
    audit: int
    unshare: int
    clone: int
    clone3: int
    denied: tuple[int, ...]


SECCOMP_ARCH = {
    "x86_64": SyscallTable(0xC000003E, 272, 56, 435, (250, 248, 249, 321, 323, 298, 425, 246, 175, 313, 176)),
    "aarch64": SyscallTable(0xC00000B7, 97, 220, 435, (219, 217, 218, 280, 282, 241, 425, 104, 105, 273, 106)),
}
# denied, in order: keyctl, add_key, request_key, bpf, userfaultfd, perf_event_open, io_uring_setup,
# kexec_load, init_module, finit_module, delete_module: kernel surface no test run needs.

SANDBOX_ID = 1000  # uid and gid of the command inside the sandbox
HOST_ID_FOR_ROOT = 65534  # what that id is on the host when the verifier runs as root (nobody/nogroup)
WORKSPACE = "/workspace"
HOME = "/tmp/home"
STATUS_FILE = "status.json"
ETC_COPIES = ("ld.so.cache", "ld.so.conf", "ld.so.conf.d", "localtime", "alternatives")
ETC_WRITTEN = {
    "passwd": "root:x:0:0:root:/root:/usr/sbin/nologin\n"
    f"sandbox:x:{SANDBOX_ID}:{SANDBOX_ID}:sandbox:{HOME}:/bin/sh\n"
    "nobody:x:65534:65534:nobody:/nonexistent:/usr/sbin/nologin\n",
    "group": f"root:x:0:\nsandbox:x:{SANDBOX_ID}:\nnogroup:x:65534:\n",
    "hosts": "127.0.0.1\tlocalhost sandbox\n::1\tlocalhost\n",
    "hostname": "sandbox\n",
    "nsswitch.conf": "passwd: files\ngroup: files\nhosts: files\n",
}
DEVICES = ("null", "zero", "full", "random", "urandom")

_libc = ctypes.CDLL(None, use_errno=True)


def _check(result: int, what: str) -> int:
    if result < 0:
        error = ctypes.get_errno()
        raise OSError(error, f"{what}: {os.strerror(error)}")
    return result


def _mount(source: str | None, target: str, fstype: str | None, flags: int, data: str | None = None) -> None:
    def encode(text: str | None) -> bytes | None:
        return None if text is None else text.encode()

    _check(
        _libc.mount(encode(source), encode(target), encode(fstype), ctypes.c_ulong(flags), encode(data)),
        f"mount {fstype or source} on {target}",
    )


def _make_read_only(target: str) -> None:
    """Make the mount at ``target`` and all below it read-only, nosuid and nodev (mount_setattr(2)).

    Unlike a remount, this keeps the flags the kernel locked on mounts inherited from the host.
    """
    attr = struct.pack("QQQQ", MOUNT_ATTR_RDONLY | MOUNT_ATTR_NOSUID | MOUNT_ATTR_NODEV, 0, 0, 0)
    buffer = ctypes.create_string_buffer(attr, len(attr))
    _check(
        _libc.syscall(SYS_MOUNT_SETATTR, AT_FDCWD, target.encode(), AT_RECURSIVE, buffer, len(attr)),
        f"make {target} read-only",
    )


def _bind(source: str, target: str, read_only: bool = True) -> None:
    if os.path.isdir(source):
        os.makedirs(target, exist_ok=True)
    else:
        os.makedirs(os.path.dirname(target), exist_ok=True)
        Path(target).touch()
    _mount(source, target, None, MS_BIND | MS_REC)
    if read_only:
        _make_read_only(target)


# -- the outer process -------------------------------------------------------------------------------


def _write_maps_as_root(pid: int) -> None:
    """As host root: map 0 to host root (the init) and the sandbox id to host nobody (the command)."""
    for kind in ("uid", "gid"):
        with open(f"/proc/{pid}/{kind}_map", "w") as handle:
            handle.write(f"0 0 1\n{SANDBOX_ID} {HOST_ID_FOR_ROOT} 1\n")


def _enter_namespaces() -> None:
    """unshare(2) all namespaces and get the id maps written.

    An unprivileged user may only map itself; it becomes the sandbox id. Root cannot map itself usefully
    (the kernel does not enforce RLIMIT_NPROC for host root), so a helper forked before the unshare, still
    root in the host's namespace, writes a map where the command's id is host nobody.
    """
    if os.geteuid() != 0:
        uid, gid = os.geteuid(), os.getegid()
        _check(_libc.unshare(NAMESPACES), "unshare")
        Path("/proc/self/setgroups").write_text("deny")
        Path("/proc/self/uid_map").write_text(f"{SANDBOX_ID} {uid} 1\n")
        Path("/proc/self/gid_map").write_text(f"{SANDBOX_ID} {gid} 1\n")
        return
    ready_read, ready_write = os.pipe()
    me = os.getpid()
    helper = os.fork()
    if helper == 0:
        os.close(ready_write)
        code = 1
        try:
            if os.read(ready_read, 1) == b"u":
                _write_maps_as_root(me)
                code = 0
        finally:
            os._exit(code)
    os.close(ready_read)
    try:
        _check(_libc.unshare(NAMESPACES), "unshare")
        os.write(ready_write, b"u")
    finally:
        os.close(ready_write)
        _pid, status = os.waitpid(helper, 0)
    if status != 0:
        raise OSError(errno.EPERM, "could not write the user namespace's id maps")


def main(config_path: str) -> None:
    """The outer process: enter the namespaces, run the inner init, pass its exit code on."""
    config = json.loads(Path(config_path).read_text())
    os.umask(0o022)  # what the init creates in the new root must be readable by the sandbox id
    out_dir = config["out_dir"]
    try:
        _enter_namespaces()
    except OSError as error:
        _write_status_at(out_dir, {"error": f"cannot create the namespaces: {error}", "stage": "unshare"})
        sys.exit(1)
    lifeline_read, lifeline_write = os.pipe()
    child: list[int] = []
    stopping: list[bool] = []

    def stop(_signum: int, _frame: object) -> None:
        stopping.append(True)
        for pid in child:
            os.kill(pid, signal.SIGKILL)

    signal.signal(signal.SIGTERM, stop)
    pid = os.fork()
    if pid == 0:
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        os.close(lifeline_write)
        code = 1
        try:
            code = _inner(config, lifeline_read)
        except BaseException:  # report it, and never fall back into the outer code
            traceback.print_exc()
        finally:
            os._exit(code)
    child.append(pid)
    if stopping:
        os.kill(pid, signal.SIGKILL)
    _pid, status = os.waitpid(pid, 0)
    code = os.waitstatus_to_exitcode(status)
    sys.exit(code if code >= 0 else 128 - code)


# -- the inner process: PID 1 ------------------------------------------------------------------------


def _write_status_at(out_dir: str, status: dict[str, Any]) -> None:
    Path(out_dir, STATUS_FILE).write_text(json.dumps(status))


def _write_out(out_fd: int, name: str, data: bytes) -> None:
    handle = os.open(name, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, 0o600, dir_fd=out_fd)
    with os.fdopen(handle, "wb") as stream:
        stream.write(data)


def _inner(config: dict[str, Any], lifeline: int) -> int:
    """PID 1 of the sandbox; returns its exit code. Reports through ``status.json`` in the out folder."""
    try:
        common.prctl(common.PR_SET_PDEATHSIG, signal.SIGKILL)
        if select.select([lifeline], [], [], 0)[0]:  # the outer process is already gone
            return 1
        common.prctl(PR_SET_DUMPABLE, 0)  # so the command can neither ptrace us nor open /proc/1/fd
        out_fd = os.open(config["out_dir"], os.O_RDONLY | os.O_DIRECTORY)
    except OSError as error:
        _write_status_at(config["out_dir"], {"error": str(error), "stage": "init"})
        return 1
    status: dict[str, Any]
    try:
        _build_root(config)
        _forbid_nested_user_namespaces()
        _pivot_into(config["new_root"])
        status = _run_command(config)
        files, too_large = common.collect_files(WORKSPACE, config["collect"])
    except OSError as error:
        failure = {"error": str(error), "stage": "setup", "errno": error.errno}
        _write_out(out_fd, STATUS_FILE, json.dumps(failure).encode())
        return 1
    names = {}
    for number, (relative, data) in enumerate(files.items()):
        names[relative] = f"file-{number}"
        _write_out(out_fd, names[relative], data)
    status.update(files=names, too_large=too_large)
    _write_out(out_fd, STATUS_FILE, json.dumps(status).encode())
    return 0


def _build_root(config: dict[str, Any]) -> None:
    """Build the new root on a tmpfs at ``new_root`` (a folder of the host's temp dir, seen only by us)."""
    limits = Limits(**config["limits"])
    root = config["new_root"]
    _mount(None, "/", None, MS_REC | MS_PRIVATE)
    _mount("tmpfs", root, "tmpfs", MS_NOSUID | MS_NODEV, "size=16m,mode=0755")
    for name in ("bin", "sbin", "lib", "lib32", "lib64", "libx32", "usr"):
        source = f"/{name}"
        if os.path.islink(source):
            os.symlink(os.readlink(source), f"{root}/{name}")
        elif os.path.isdir(source):
            _bind(source, f"{root}/{name}")
    _writable_tmpfs(f"{root}/tmp", limits.tmp_mb, "mode=1777")
    _writable_tmpfs(f"{root}{WORKSPACE}", limits.workspace_mb, f"mode=0755,uid={SANDBOX_ID},gid={SANDBOX_ID}")
    for path in config["interpreter_paths"]:
        _bind(path, f"{root}{path}")
    _populate_etc(f"{root}/etc")
    _populate_dev(f"{root}/dev")
    os.makedirs(f"{root}/proc")
    _mount("proc", f"{root}/proc", "proc", MS_NOSUID | MS_NODEV | MS_NOEXEC)
    socket.sethostname("sandbox")
    _bring_up_loopback()
    try:
        common.copy_tree(config["tree"], f"{root}{WORKSPACE}")
    except OSError as error:
        if error.errno == errno.ENOSPC:
            raise OSError(error.errno, f"the tree does not fit the {limits.workspace_mb} MB workspace") from None
        raise
    os.makedirs(f"{root}{HOME}")
    _hand_over(f"{root}{WORKSPACE}")
    _hand_over(f"{root}{HOME}")


def _writable_tmpfs(target: str, size_mb: int, options: str) -> None:
    os.makedirs(target)
    _mount("tmpfs", target, "tmpfs", MS_NOSUID | MS_NODEV, f"size={size_mb}m,{options}")


def _hand_over(folder: str) -> None:
    """Give ``folder`` and everything in it to the sandbox id, so the command can write there."""
    os.lchown(folder, SANDBOX_ID, SANDBOX_ID)
    for parent, folders, files in os.walk(folder):
        for name in folders + files:
            os.lchown(os.path.join(parent, name), SANDBOX_ID, SANDBOX_ID)


def _populate_etc(etc: str) -> None:
    os.makedirs(etc)
    for name in ETC_COPIES:
        source = f"/etc/{name}"
        if os.path.islink(source):
            os.symlink(os.readlink(source), f"{etc}/{name}")
        elif os.path.isdir(source):
            shutil.copytree(source, f"{etc}/{name}", symlinks=True)
        elif os.path.isfile(source):
            shutil.copyfile(source, f"{etc}/{name}")
    for name, text in ETC_WRITTEN.items():
        Path(etc, name).write_text(text)


def _populate_dev(dev: str) -> None:
    os.makedirs(dev)
    for name in DEVICES:
        _bind(f"/dev/{name}", f"{dev}/{name}", read_only=False)
    for name, target in (
        ("fd", "/proc/self/fd"),
        ("stdin", "/proc/self/fd/0"),
        ("stdout", "/proc/self/fd/1"),
        ("stderr", "/proc/self/fd/2"),
    ):
        os.symlink(target, f"{dev}/{name}")


def _bring_up_loopback() -> None:
    """Bring up ``lo`` of the new, otherwise empty network namespace (tests may talk to localhost)."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as probe:
        request = struct.pack("16sH14x", b"lo", 0)
        flags = struct.unpack("16sH14x", fcntl.ioctl(probe, SIOCGIFFLAGS, request))[1]
        fcntl.ioctl(probe, SIOCSIFFLAGS, struct.pack("16sH14x", b"lo", flags | IFF_UP))


def _pivot_into(root: str) -> None:
    """pivot_root(2) into ``root``, detach the old root, and make the new root itself read-only."""
    number = SYS_PIVOT_ROOT.get(platform.machine())
    if number is None:
        raise OSError(errno.ENOSYS, f"pivot_root: unknown syscall number on {platform.machine()}")
    os.chdir(root)
    _check(_libc.syscall(number, b".", b"."), "pivot_root")
    _check(_libc.umount2(b".", MNT_DETACH), "detach the old root")
    os.chdir("/")
    _mount(None, "/", None, MS_REMOUNT | MS_BIND | MS_RDONLY | MS_NOSUID | MS_NODEV)


def _bpf(code: int, k: int, jump_true: int = 0, jump_false: int = 0) -> bytes:
    return struct.pack("HBBI", code, jump_true, jump_false, k)


def seccomp_program(machine: str) -> bytes | None:
    """The filter the command runs under: no new user namespace (unshare or clone with CLONE_NEWUSER;
    clone3, whose flags a classic filter cannot read, answers ENOSYS so that the C library falls back
    to clone), no key, BPF, perf, userfaultfd, io_uring or kernel-module calls; None on an unknown machine."""
    table = SECCOMP_ARCH.get(machine)
    if table is None:
        return None
    eperm, enosys = SECCOMP_RET_ERRNO | errno.EPERM, SECCOMP_RET_ERRNO | errno.ENOSYS
    head = [
        _bpf(BPF_LD_W_ABS, 4),
        _bpf(BPF_JEQ_K, table.audit, 1, 0),
        _bpf(BPF_RET_K, eperm),  # another ABI (32-bit compat): refused
        _bpf(BPF_LD_W_ABS, 0),
        _bpf(BPF_JGE_K, X32_SYSCALL_BIT, 0, 1),
        _bpf(BPF_RET_K, eperm),  # the x32 ABI's numbers would slip past the ones below
        _bpf(BPF_JEQ_K, table.clone3, 0, 1),
        _bpf(BPF_RET_K, enosys),
    ]
    checks = []
    for number in table.denied:
        checks += [_bpf(BPF_JEQ_K, number, 0, 1), _bpf(BPF_RET_K, eperm)]
    flags = [
        _bpf(BPF_JEQ_K, table.unshare, 1, 0),
        _bpf(BPF_JEQ_K, table.clone, 0, 3),
        _bpf(BPF_LD_W_ABS, 16),
        _bpf(BPF_JSET_K, CLONE_NEWUSER, 0, 1),
        _bpf(BPF_RET_K, eperm),
        _bpf(BPF_RET_K, SECCOMP_RET_ALLOW),
    ]
    return b"".join(head + checks + flags)


def _install_seccomp() -> None:
    """Install :func:`seccomp_program` for this process and all it starts (needs no_new_privs first)."""
    program = seccomp_program(platform.machine())
    if program is None:
        return
    buffer = ctypes.create_string_buffer(program, len(program))

    class SockFprog(ctypes.Structure):
        _fields_ = (("len", ctypes.c_ushort), ("filter", ctypes.c_void_p))

    fprog = SockFprog(len(program) // 8, ctypes.cast(buffer, ctypes.c_void_p))
    common.prctl(PR_SET_SECCOMP, SECCOMP_MODE_FILTER, ctypes.addressof(fprog))


def _forbid_nested_user_namespaces() -> None:
    """Set this user namespace's own limit of nested user namespaces to 0 (it binds every namespace below
    it too), where the kernel lets the namespace's root do so; the seccomp filter stands in any case."""
    with contextlib.suppress(OSError):
        Path("/proc/sys/user/max_user_namespaces").write_text("0\n")


def _drop_privileges(limits: Limits) -> None:
    """In the command's process before exec: rlimits, no capabilities ever again, the sandbox id."""
    common.apply_limits(limits, limits.processes)  # counted per user namespace (Linux >= 5.14)
    common.prctl(PR_SET_SECUREBITS, SECUREBITS)
    last_cap = int(Path("/proc/sys/kernel/cap_last_cap").read_text())
    for capability in range(last_cap + 1):
        common.prctl(PR_CAPBSET_DROP, capability)
    common.prctl(PR_CAP_AMBIENT, PR_CAP_AMBIENT_CLEAR_ALL)
    if os.getuid() == 0:  # root mode: leave inner root for the sandbox id, which drops all capabilities
        os.setgroups([])
        os.setresgid(SANDBOX_ID, SANDBOX_ID, SANDBOX_ID)
        os.setresuid(SANDBOX_ID, SANDBOX_ID, SANDBOX_ID)
    common.prctl(PR_SET_NO_NEW_PRIVS, 1)
    _install_seccomp()


def _start_command(config: dict[str, Any]) -> int:
    pid = os.fork()
    if pid:
        return pid
    try:
        _drop_privileges(Limits(**config["limits"]))
        null = os.open("/dev/null", os.O_RDONLY)
        os.dup2(null, 0)
        os.closerange(3, 1 << 16)
        os.chdir(WORKSPACE)
        os.execve(config["python"], [config["python"], *config["args"]], config["env"])
    except BaseException as error:  # whatever it is, the command must not run
        os.write(2, f"verifier sandbox: the command could not be started: {error}\n".encode())
    finally:
        os._exit(127)


def _run_command(config: dict[str, Any]) -> dict[str, Any]:
    """Run the command; when it ends, kill all else in the namespace; reap everything; report."""
    command = _start_command(config)
    status: int | None = None
    while True:
        try:
            pid, wait_status = os.waitpid(-1, 0)
        except ChildProcessError:
            break
        if pid == command:
            status = wait_status
        if status is not None:
            with contextlib.suppress(ProcessLookupError):
                os.kill(-1, signal.SIGKILL)  # from PID 1: every other process of this namespace
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    code = os.waitstatus_to_exitcode(status) if status is not None else None
    return {
        "exit_status": code if code is not None and code >= 0 else None,
        "signal": -code if code is not None and code < 0 else None,
        "cpu_seconds": round(usage.ru_utime + usage.ru_stime, 3),
        "max_rss_kb": int(usage.ru_maxrss),
    }
