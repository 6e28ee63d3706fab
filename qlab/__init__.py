"""qlab: a CPU workbench for Q-learning on delayed-feedback control tasks."""

from qlab.tasks import register_tasks

register_tasks()

__version__ = "0.1.0"
