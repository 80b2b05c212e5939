"""The survey: survey.toml and the CSV tables it names, the ground model, the frozen survey containers."""
