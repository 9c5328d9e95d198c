"""English stopwords for the demo-corpus paraphrase check.

Where the list comes from: the classic English stopword list as shipped by
NLTK (``nltk.corpus.stopwords.words("english")``), compiled from memory
rather than copied from the package, with contractions reduced to the
tokens the tokeniser below produces (``don't`` -> ``don`` and ``t``).
Added to it are the modal auxiliaries ``would``, ``could``, ``shall``,
``may``, ``might``, ``must`` and the pronouns ``us`` and ``whose``: function
words that NLTK's list lacks but other widely used lists (scikit-learn's,
and for some of them Snowball's) include, again from memory. Only function words
are listed: articles, pronouns, auxiliaries, prepositions, conjunctions,
question words and a few degree/quantity adverbs. No content word was
added to make any demo question pass.

``content_words`` is the tokenisation the paraphrase check uses: lower-case,
split on anything that is not an ASCII letter or digit, drop stopwords.
"""

from __future__ import annotations

import re

__all__ = ["STOPWORDS", "content_words"]

# Grouped by kind, one group or two per line; split on whitespace below.
_WORDS = """
i me my myself we our ours ourselves us you your yours yourself yourselves
he him his himself she her hers herself it its itself they them their theirs themselves
what which who whom whose this that these those
am is are was were be been being have has had having do does did doing
would could should shall will may might must can
a an the and but if or because as until while
of at by for with about against between into through during before after
above below to from up down in out on off over under
again further then once here there when where why how
all any both each few more most other some such no nor not only own same
so than too very just now
s t d ll m o re ve y ain aren couldn didn doesn don hadn hasn haven isn
ma mightn mustn needn shan shouldn wasn weren won wouldn
"""

STOPWORDS: frozenset[str] = frozenset(_WORDS.split())

_TOKEN = re.compile(r"[a-z0-9]+")


def content_words(text: str) -> set[str]:
    """Return the set of lower-cased alphanumeric tokens of ``text`` that are not stopwords."""
    return {w for w in _TOKEN.findall(text.lower()) if w not in STOPWORDS}
