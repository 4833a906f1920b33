"""The README's table contract is generated from the models and must stay in step with them."""

from pathlib import Path

from takeup.schemas.contract import contract_markdown


def test_readme_contract_matches_models():
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    assert contract_markdown().strip() in readme, "run `python -m takeup.schemas.contract` and update the README"


def test_readme_has_no_placeholders():
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    assert "_SECTION" not in readme


def test_readme_config_example_is_valid():
    import tomllib

    from takeup.schemas.config import parse_config
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    block = readme.split("```toml\n", 1)[1].split("```", 1)[0]
    cfg = parse_config(tomllib.loads(block), "README example")
    assert cfg.study_id == "evening-numeracy-2026" and cfg.primary_outcome == "numeracy_score"
