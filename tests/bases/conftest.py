"""The fixture the registry tests share: a tables folder with one sound basis."""

import pytest

from tests.bases.test_registry import (
    SOUND_FILE,
    SOUND_ID,
    SOUND_VERSION,
    basis_text,
    csv_mortality,
    csv_text,
    write,
)


@pytest.fixture()
def folder(tmp_path):
    """A tables folder holding one sound CSV basis (its data under data/)."""
    write(tmp_path, "data/sound.csv", csv_text())
    write(tmp_path, SOUND_FILE, basis_text(SOUND_ID, SOUND_VERSION,
                                           csv_mortality("data/sound.csv"), default=True))
    return tmp_path
