"""Layer selections: which hidden states feed the pooling.

``hidden_states`` is the tuple a Hugging Face encoder returns with
``output_hidden_states=True``: the embedding output first, then one tensor per
layer. An integer selects that entry (negative counts from the end).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Callable, Sequence, Union

if TYPE_CHECKING:
    import torch

LayerChoice = Union[str, int]
LayerFn = Callable[[Sequence["torch.Tensor"]], "torch.Tensor"]


def last_layer(hidden_states: Sequence[torch.Tensor]) -> torch.Tensor:
    return hidden_states[-1]


def second_last_layer(hidden_states: Sequence[torch.Tensor]) -> torch.Tensor:
    return hidden_states[-2]


def mean_last_4_layers(hidden_states: Sequence[torch.Tensor]) -> torch.Tensor:
    return sum(hidden_states[-4:]) / 4


def concat_last_4_layers(hidden_states: Sequence[torch.Tensor]) -> torch.Tensor:
    import torch

    return torch.cat(tuple(hidden_states[-4:]), dim=-1)


LAYER_SELECTIONS: dict[str, LayerFn] = {
    "last": last_layer,
    "second_last": second_last_layer,
    "mean_last_4": mean_last_4_layers,
    "concat_last_4": concat_last_4_layers,
}

# How many hidden-state entries (embeddings included) each named choice needs.
LAYERS_NEEDED: dict[str, int] = {"last": 1, "second_last": 2, "mean_last_4": 4, "concat_last_4": 4}

# How many times the model's width each choice produces.
WIDTH_FACTOR: dict[str, int] = {"concat_last_4": 4}


def selected_hidden(hidden_states: Sequence[torch.Tensor], choice: LayerChoice) -> torch.Tensor:
    """The (batch, tokens, dim) tensor that a layer choice feeds to pooling."""
    if isinstance(choice, int):
        return hidden_states[choice]
    return LAYER_SELECTIONS[choice](hidden_states)


def layer_choice_fits(choice: LayerChoice, n_hidden_states: int) -> bool:
    """Whether a model with this many hidden-state entries has the layers a choice asks for."""
    if isinstance(choice, int):
        return -n_hidden_states <= choice < n_hidden_states
    return LAYERS_NEEDED[choice] <= n_hidden_states


def output_width(choice: LayerChoice, model_width: int) -> int:
    if isinstance(choice, int):
        return model_width
    return model_width * WIDTH_FACTOR.get(choice, 1)
