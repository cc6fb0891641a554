"""The safety note, one text for every place scores reach people: the CLI's output and help, the run JSON, the HTML
report (the README quotes it). Apart from the vocabularies so that rewording it never touches a stage's code
version."""

from __future__ import annotations

SAFETY_NOTE = ("Scores are a screening aid that points people at recordings and seconds worth a look, not a "
               "certification of airworthiness or roadworthiness: whether to ground, repair or release a vehicle is "
               "decided by the operator's own procedures and the local rules.")
