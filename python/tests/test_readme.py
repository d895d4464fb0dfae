"""The Python examples of the README run as written, from a directory laid out like the
repository's (fixtures/ beside them)."""

import re

from conftest import REPO


def readme_examples() -> str:
    text = (REPO / "README.md").read_text()
    section = text[text.index("## Python\n"):]
    section = section[: section.index("\n## ", 1)]
    blocks = re.findall(r"```python\n(.*?)```", section, re.S)
    assert len(blocks) == 3, "resize a file, resample an array, draw maps"
    return "\n".join(blocks)


def test_the_readme_examples_run(tmp_path, monkeypatch):
    (tmp_path / "fixtures").symlink_to(REPO / "fixtures")
    monkeypatch.chdir(tmp_path)
    exec(compile(readme_examples(), "README.md", "exec"), {})
    for name in ["pollen-vit-tiny-224.safetensors", "maps.png", "random-maps.png"]:
        assert (tmp_path / "demo-out" / name).stat().st_size > 0
