"""A local browser app: upload inputs, build the rulebook in a form, run audits with live progress, explore results."""
