"""`pdgc handoff`: a package for flight-software engineers, with target checks.

From a generated NATIVE tree (the backend meant to fly: heap-free, reentrant,
C99) this writes a directory and a ``.tar.gz`` of it holding the generated
sources, build files (make, CMake), the plan-once program, test vectors with a C runner
(:mod:`codegen.verify.vectors`), and a verification record (Markdown and HTML). The
target checks run here, on a scratch copy of the package, with the package's
own Makefile where one exists:

- strict host build of every C file (-std=c99 -Wall -Wextra -Wpedantic
  -Wshadow -Wconversion -Werror), and cppcheck;
- the test runner on the host, and on arm-linux-gnueabihf under qemu-arm;
- Cortex-M7 builds with arm-none-eabi-gcc: double-precision FPU with this
  tree, single-precision FPU with a companion single-precision tree generated
  here; text/data/bss from arm-none-eabi-size, sizes of the workspace and plan
  on the target, worst stack depth from -fstack-usage -fcallgraph-info;
- statement coverage of the sources by the vectors (gcov).

cvxpygen trees are refused: their solvers use the heap and global state.

The package's bytes are reproducible: no timestamps, no absolute paths, no
host names; the tarball has sorted entries, fixed mtime, uid, gid and modes,
and a gzip header with mtime 0. A missing tool makes the record say "not
run" with the reason; :data:`REQUIRED_TOOLS` lists them for the tests (which
fail in CI when one is missing).

Modules: ``tools`` (flags, running a tool), ``package`` (inputs checked, the
package's files, the tarball), ``checks`` (the target checks and `pdgc check`
on the tree), ``toolout`` (reading the tools' output), ``record``,
``record_checks`` and ``record_blocks`` (the verification record), ``run``
(:func:`~codegen.verify.handoff.run.handoff`, the whole command).
"""
