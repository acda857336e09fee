"""The base that both the controller (`rig`) and the instrument layer (`drivers`) stand on:
the project's one exception tree (`errors`), the checked-TOML reader behind every input file
(`tomlcheck`) and engineering-prefix formatting (`units`). It imports nothing from either.
"""

__all__: list[str] = []
