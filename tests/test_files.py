"""files: a data source is read only when it is a regular file within the size bound;
devices, FIFOs, directories and huge files get one clear error, exit 2 (recipe paths:
test_user_paths.py)."""

import os

from conftest import invoke, write_recipe

from runner.datasets.files import MAX_DATA_BYTES


def recipe_for(tmp_path, source):
    return write_recipe(
        tmp_path,
        f"""
        name = "files"
        [data]
        source = "{source}"
        target = "y"
        """,
    )


def check_refused(*args):
    result = invoke("check", *args, "--no-probe")
    assert result.exit_code == 2, result.output
    message = result.stderr.strip()
    assert message.startswith("error: ") and "\n" not in message and "Traceback" not in result.output
    return message


def test_device_is_refused(tmp_path):
    message = check_refused(recipe_for(tmp_path, "/dev/zero"))
    assert 'data.source: is a device, not a regular file, got "/dev/zero"' in message


def test_fifo_is_refused_without_waiting_for_a_writer(tmp_path):
    """Opening a FIFO for reading would block until a writer comes; it is refused at once."""
    os.mkfifo(tmp_path / "pipe.csv")
    message = check_refused(recipe_for(tmp_path, "pipe.csv"))
    assert "is a FIFO (named pipe), not a regular file" in message


def test_directory_without_class_folders_is_refused(tmp_path):
    (tmp_path / "folder").mkdir()
    (tmp_path / "folder" / "notes.txt").write_text("not an image folder")
    message = check_refused(recipe_for(tmp_path, "folder"))
    assert "the folder has no class subfolders with images" in message


def test_huge_file_is_refused_naming_the_bound(tmp_path):
    """A sparse file larger than the bound (no disk used) is refused before any read."""
    with open(tmp_path / "huge.csv", "wb") as f:
        f.truncate(MAX_DATA_BYTES + 1)
    message = check_refused(recipe_for(tmp_path, "huge.csv"))
    assert "the file is 2.0 GiB, larger than the 2 GiB this tool reads" in message
