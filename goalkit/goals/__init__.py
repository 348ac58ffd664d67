"""Goal maps (state -> goal vector), embeddings and the neighbour index.

The neighbour index (:mod:`goalkit.goals.neighbours`) is not imported here, so that using a
goal map does not pay for importing faiss.
"""

from goalkit.goals.goalmap import GoalMap, IndexGoalMap, goal_map_from_fields
from goalkit.goals.embedfile import load_embedding, save_embedding
from goalkit.goals.embedmap import EmbeddingGoalMap
from goalkit.goals.fitlogs import embedding_goal_map, fit_on_logs
from goalkit.goals.frames import FrameEmbedding
from goalkit.goals.linear import PCA, Raw, Standardised
from goalkit.goals.precomputed import Precomputed
from goalkit.goals.sfa import SFA

__all__ = ["GoalMap", "IndexGoalMap", "goal_map_from_fields", "EmbeddingGoalMap", "FrameEmbedding", "PCA",
           "Raw", "Standardised", "Precomputed", "SFA", "load_embedding", "save_embedding",
           "embedding_goal_map", "fit_on_logs"]
