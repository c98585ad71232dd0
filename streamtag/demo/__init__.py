"""Invented demo world and a deterministic generator of labelled log lines.

`scenario` holds the world (the Orrivask Cooperative: its staff, machines, services, sites, partners);
`generate` turns it into labelled train/dev/test sets and an unlabelled stream for the daemon demo.
Every name in here is made up; addresses and domains come from documentation/reserved ranges.
"""
