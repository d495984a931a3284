"""Fuzz the file-reading boundary of onnxcal with atheris (coverage-guided, libFuzzer).

    .venv/bin/pip install atheris            # in your venv only: not a dependency of onnxcal
    .venv/bin/python tests/fuzz/fuzz_load.py model -max_total_time=60
    .venv/bin/python tests/fuzz/fuzz_load.py npz|capture|fit -max_total_time=60

The first argument names the target (see targets.py); the rest go to
libFuzzer. The seed corpus is made from the fixtures into
tests/fuzz/corpus/TARGET/ (not committed) on the first run, and the corpus
grows there; findings are written to tests/fuzz/findings/, the fuzzed file to
tests/fuzz/work/TARGET/. Default limits:
-timeout=20 (seconds per input: a hang is a finding) and -rss_limit_mb=4096.
A finding is any exception other than OnnxcalError, a hang or a crash; rerun
one with `fuzz_load.py TARGET FILE`. See docs/fuzzing.md.
"""

from __future__ import annotations

import sys
from pathlib import Path

import atheris

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

with atheris.instrument_imports(include=["onnxcal"]):
    import targets


def main() -> None:
    if len(sys.argv) < 2 or sys.argv[1] not in targets.TARGETS:
        sys.exit(f"usage: {sys.argv[0]} {{{','.join(targets.TARGETS)}}} [libFuzzer options] [files]")
    name = sys.argv.pop(1)
    target = targets.TARGETS[name]
    args = list(sys.argv)
    files = [a for a in args[1:] if not a.startswith("-")]
    if not files:  # a fuzzing run: seed the corpus once
        corpus = HERE / "corpus" / name
        if not corpus.is_dir():
            corpus.mkdir(parents=True)
            for file, data in targets.seeds(name).items():
                (corpus / file).write_bytes(data)
        args.append(str(corpus))
    findings = HERE / "findings"
    findings.mkdir(exist_ok=True)
    defaults = {"-timeout": "20", "-rss_limit_mb": "4096", "-artifact_prefix": f"{findings}/{name}-"}
    for flag, value in defaults.items():
        if not any(a.startswith(flag + "=") for a in args):
            args.insert(1, f"{flag}={value}")
    targets.use_workdir(HERE / "work" / name)
    targets.demo_model()  # load the fixtures before fuzzing starts
    kwargs = {}
    if name == "model":
        kwargs["custom_mutator"] = lambda data, max_size, seed: targets.mutate_model(
            data, max_size, seed, atheris.Mutate
        )
    atheris.Setup(args, target, **kwargs)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
