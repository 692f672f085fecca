//! The chain's structure: strongly connected components (Tarjan's algorithm, iterative) decide
//! which states are absorbing, which are transient, and which lie in closed classes with no way
//! out to an absorbing state ("traps"). Each trap class acts as one more absorbing outcome for the
//! linear systems, so `I - Q` over the transient states is always nonsingular.

use crate::model::chain::Chain;

/// What a state is, structurally.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum StateKind {
    /// Keeps the walk forever once reached.
    Absorbing,
    /// Left with certainty eventually: part of the linear systems.
    Transient,
    /// In a closed class of non-absorbing states: the walk circulates there forever.
    Trapped,
}

/// Classification of every state.
#[derive(Clone, Debug)]
pub struct Structure {
    /// Kind of each state.
    pub kind: Vec<StateKind>,
    /// Transient states, in the order of the linear systems' unknowns.
    pub transient: Vec<usize>,
    /// Position of each state among `transient` (`None` for the others).
    pub position: Vec<Option<usize>>,
    /// Absorbing states, in state order.
    pub absorbing: Vec<usize>,
    /// Closed non-absorbing classes, each listed in state order.
    pub trap_classes: Vec<Vec<usize>>,
    /// For a trapped state, the index of its class in `trap_classes`.
    pub trap_class_of: Vec<Option<usize>>,
}

impl Structure {
    /// Classifies the states of a validated chain.
    #[must_use]
    pub fn of(chain: &Chain) -> Self {
        let n = chain.len();
        let components = strongly_connected_components(chain);
        let mut component_of = vec![0usize; n];
        for (c, members) in components.iter().enumerate() {
            for &s in members {
                component_of[s] = c;
            }
        }
        let mut kind = vec![StateKind::Transient; n];
        let mut trap_classes = Vec::new();
        let mut trap_class_of = vec![None; n];
        for (c, members) in components.iter().enumerate() {
            if members.len() == 1 && chain.absorbing[members[0]] {
                kind[members[0]] = StateKind::Absorbing;
                continue;
            }
            let closed = members
                .iter()
                .all(|&s| chain.row(s).all(|(t, _)| component_of[t] == c));
            if closed {
                let mut class = members.clone();
                class.sort_unstable();
                for &s in &class {
                    kind[s] = StateKind::Trapped;
                    trap_class_of[s] = Some(trap_classes.len());
                }
                trap_classes.push(class);
            }
        }
        trap_classes.sort_by_key(|class| class[0]);
        for (k, class) in trap_classes.iter().enumerate() {
            for &s in class {
                trap_class_of[s] = Some(k);
            }
        }
        let transient: Vec<usize> = (0..n)
            .filter(|&s| kind[s] == StateKind::Transient)
            .collect();
        let mut position = vec![None; n];
        for (p, &s) in transient.iter().enumerate() {
            position[s] = Some(p);
        }
        let absorbing = (0..n)
            .filter(|&s| kind[s] == StateKind::Absorbing)
            .collect();
        Structure {
            kind,
            transient,
            position,
            absorbing,
            trap_classes,
            trap_class_of,
        }
    }
}

/// Tarjan's strongly connected components, without recursion (chains can be millions deep).
fn strongly_connected_components(chain: &Chain) -> Vec<Vec<usize>> {
    const UNSEEN: usize = usize::MAX;
    let n = chain.len();
    let mut order = vec![UNSEEN; n];
    let mut low = vec![0usize; n];
    let mut on_stack = vec![false; n];
    let mut stack = Vec::new();
    let mut components = Vec::new();
    let mut counter = 0;
    // Each frame: (state, next edge offset into its row).
    let mut frames: Vec<(usize, usize)> = Vec::new();
    for root in 0..n {
        if order[root] != UNSEEN {
            continue;
        }
        frames.push((root, chain.row_start[root]));
        order[root] = counter;
        low[root] = counter;
        counter += 1;
        stack.push(root);
        on_stack[root] = true;
        while let Some(&mut (state, ref mut edge)) = frames.last_mut() {
            if *edge < chain.row_start[state + 1] {
                let target = chain.targets[*edge];
                *edge += 1;
                if order[target] == UNSEEN {
                    order[target] = counter;
                    low[target] = counter;
                    counter += 1;
                    stack.push(target);
                    on_stack[target] = true;
                    frames.push((target, chain.row_start[target]));
                } else if on_stack[target] {
                    low[state] = low[state].min(order[target]);
                }
                continue;
            }
            frames.pop();
            if let Some(&(parent, _)) = frames.last() {
                low[parent] = low[parent].min(low[state]);
            }
            if low[state] == order[state] {
                let mut component = Vec::new();
                while let Some(s) = stack.pop() {
                    on_stack[s] = false;
                    component.push(s);
                    if s == state {
                        break;
                    }
                }
                components.push(component);
            }
        }
    }
    components
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::validate::validate;
    use serde_json::json;

    #[test]
    fn finds_trap_classes_and_transient_states() {
        // a -> {b, win}; b -> {c}; c <-> d closed with no way out; e -> e absorbing by rule.
        let chain = validate(
            &serde_json::from_value(json!({
                "transitions": [
                    {"from": "a", "to": "b", "probability": "1/2"},
                    {"from": "a", "to": "win", "probability": "1/2"},
                    {"from": "b", "to": "c", "probability": 1},
                    {"from": "c", "to": "d", "probability": 1},
                    {"from": "d", "to": "c", "probability": "1/2"},
                    {"from": "d", "to": "d", "probability": "1/2"},
                    {"from": "e", "to": "e", "probability": 1}
                ],
                "start": "a"
            }))
            .unwrap(),
            &Default::default(),
        )
        .unwrap();
        let s = Structure::of(&chain);
        use StateKind::*;
        assert_eq!(
            s.kind,
            [Transient, Transient, Absorbing, Trapped, Trapped, Absorbing]
        );
        assert_eq!(s.transient, [0, 1]);
        assert_eq!(s.trap_classes, [vec![3, 4]]);
        assert_eq!(s.absorbing, [2, 5]);
    }

    #[test]
    fn handles_a_long_path_without_recursion() {
        let n = 200_000;
        let transitions: Vec<_> = (0..n)
            .map(
                |i| json!({"from": format!("s{i}"), "to": format!("s{}", i + 1), "probability": 1}),
            )
            .collect();
        let chain = validate(
            &serde_json::from_value(json!({"transitions": transitions, "start": "s0"})).unwrap(),
            &Default::default(),
        )
        .unwrap();
        let s = Structure::of(&chain);
        assert_eq!(s.transient.len(), n);
        assert_eq!(s.absorbing, [n]);
    }
}
