"""The one independent reference walk of the test suite: leaves and the features above them, read from the
modelling library's own ``trees_to_dataframe`` (XGBoost and LightGBM), without treeprobe's parser."""


def library_leaves(booster) -> list[tuple[int, frozenset[str]]]:
    """(tree, names split on above the leaf) of every leaf, from the library's own ``trees_to_dataframe``."""
    frame = booster.trees_to_dataframe()
    if "Tree" in frame.columns:  # XGBoost
        tree, node, feature = frame["Tree"], frame["ID"], frame["Feature"]
        children, is_leaf = (frame["Yes"], frame["No"]), frame["Feature"] == "Leaf"
    else:  # LightGBM
        tree, node, feature = frame["tree_index"], frame["node_index"], frame["split_feature"]
        children, is_leaf = (frame["left_child"], frame["right_child"]), frame["split_feature"].isna()
    parent = {}
    for here, left, right in zip(node, *children, strict=True):
        if isinstance(left, str):
            parent[left] = parent[right] = here
    split_on = dict(zip(node, feature, strict=True))
    leaves = []
    for t, leaf in zip(tree[is_leaf], node[is_leaf], strict=True):
        above, up = set(), parent.get(leaf)
        while up is not None:
            above.add(split_on[up])
            up = parent.get(up)
        leaves.append((int(t), frozenset(above)))
    return leaves
