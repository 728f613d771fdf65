"""The README's sample output equals a fresh run of the ship demo (same config, same seed)."""

from data_demo.readme_sample import readme_block, sample_text


def test_readme_sample_output_is_current():
    assert readme_block().group(2) == sample_text(), "run: python data_demo/readme_sample.py"
