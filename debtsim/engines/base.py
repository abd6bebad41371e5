"""The one interface every engine implements: a model in, a loss law out."""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from typing import ClassVar

from debtsim.distribution import LossDistribution
from debtsim.model.specification import LinkedFactorModel

__all__ = ["Engine", "ProgressHook"]

#: Called as ``hook(done, total)`` while an engine works; units are the engine's own.
ProgressHook = Callable[[int, int], None]


class Engine(ABC):
    """Base class of the loss-law engines.

    Settings (sample counts, seeds, limits) go to the constructor; :meth:`run`
    takes only the model.  Every engine computes the law of the same model
    (see ``shared/DESIGN.md``); they differ in method and cost only.
    """

    #: Name used on the command line and in outputs.
    name: ClassVar[str]

    def refusal(self, model: LinkedFactorModel) -> str | None:
        """Why this engine cannot run ``model``, or None when it can.

        The message names a engine that can run the book where one exists.
        """
        return None

    @abstractmethod
    def run(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> LossDistribution:
        """Compute the loss law of ``model``.

        Raises
        ------
        EngineRefusedError
            When :meth:`refusal` gives a reason.
        """

    def run_without_links(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> LossDistribution:
        """Loss distribution of ``model`` read without links, discretised as :meth:`run` does.

        The comparison "without links (Gaussian copula)" must differ from the
        main distribution by contagion alone, so it uses this engine's own
        discretisation: the same factor nodes, or the same sampler and seed
        (common random numbers).  An engine whose own method does not suit
        the comparison overrides this.
        """
        return self.run(model.without_links(), progress=progress)
