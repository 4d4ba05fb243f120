# The compiled chunk scan (_chunk_scan.c); words.python_scan is its Python spelling.
def scan(
    text: str, min_word: int, max_word: int, /
) -> tuple[dict[str, None], list[str], list[str], bool]: ...
