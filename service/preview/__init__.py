"""Policy preview: what a policy version would do to real traffic, before any is routed to it.

``replay`` runs versions over captured rows (or over prompts with the bundled model) and
gathers a :class:`~service.preview.replay.PreviewReport`; ``stats`` holds the statistics and
their bootstrap intervals; ``table`` and ``page`` render a report as a terminal table and as a
self-contained HTML page; ``command`` is ``keepset policy preview``; ``progress`` its progress
bar; ``prompts.txt`` the demo prompts.
"""
