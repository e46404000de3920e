//! Output rules: what a model predicts and how its decision values become labels. Shared by
//! the exact and the compiled model (a compiled model keeps its teacher's rule).
//!
//! ```
//! use kernelpress::model::{OutputRule, Task};
//! use ndarray::array;
//! let r = OutputRule::new(Task::Ovo, vec!["a".into(), "b".into(), "c".into()], 3).unwrap();
//! // Pairs (a,b), (a,c), (b,c): positive votes for the first class of the pair.
//! assert_eq!(r.labels_of(array![[-1.0, 1.0, 2.0]].view()), vec!["b".to_string()]);
//! assert!(OutputRule::new(Task::Binary, vec!["x".into(), "x".into()], 1).is_err());
//! ```

use crate::{Error, Result};
use ndarray::ArrayView2;

/// What a model predicts and how decision values become labels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Task {
    /// One or more real outputs; no labels.
    Regression,
    /// Two classes, one decision value; positive means the second label.
    Binary,
    /// One-vs-rest: one decision value per class; the label is the arg-max (first on ties).
    Ovr,
    /// One-vs-one: one value per class pair (i<j, in order); positive votes for i, ties go to
    /// the lowest class index.
    Ovo,
}

impl Task {
    /// The task's name in files and flags.
    pub fn name(self) -> &'static str {
        match self {
            Task::Regression => "regression",
            Task::Binary => "binary",
            Task::Ovr => "ovr",
            Task::Ovo => "ovo",
        }
    }

    /// Parses a task name.
    pub fn parse(s: &str) -> Result<Task> {
        Ok(match s {
            "regression" => Task::Regression,
            "binary" => Task::Binary,
            "ovr" => Task::Ovr,
            "ovo" => Task::Ovo,
            other => {
                return Err(Error::input(format!(
                    "task '{other}' is unknown{}; expected regression, binary, ovr or ovo",
                    crate::error::did_you_mean(other, &["regression", "binary", "ovr", "ovo"])
                )))
            }
        })
    }

    /// Number of decision values for `k` labels (`None` for regression).
    pub fn outputs_for(self, k: usize) -> Option<usize> {
        match self {
            Task::Regression => None,
            Task::Binary => Some(1),
            Task::Ovr => Some(k),
            Task::Ovo => Some(k * (k.saturating_sub(1)) / 2),
        }
    }

    /// True for classifiers.
    pub fn is_classifier(self) -> bool {
        self != Task::Regression
    }

    /// The task of an expansion with `k` coefficient columns and these class labels, when
    /// none is named: no labels → regression; two labels, one column → binary; one column
    /// per label → one-vs-rest; one per pair → one-vs-one.
    pub fn infer(labels: usize, k: usize) -> Result<Task> {
        match labels {
            0 => Ok(Task::Regression),
            2 if k == 1 => Ok(Task::Binary),
            n if n == k => Ok(Task::Ovr),
            n if n * (n - 1) / 2 == k => Ok(Task::Ovo),
            n => Err(Error::input(format!(
                "cannot infer the task from {n} labels and {k} coefficient columns; name it (regression, binary, ovr or ovo)"
            ))),
        }
    }
}

/// Turns decision values into label indices under a task's rule.
pub fn label_indices(task: Task, k: usize, s: ArrayView2<f64>) -> Vec<usize> {
    s.rows()
        .into_iter()
        .map(|r| match task {
            Task::Regression => 0,
            Task::Binary => usize::from(r[0] > 0.0),
            Task::Ovr => {
                let mut best = 0;
                for j in 1..r.len() {
                    if r[j] > r[best] {
                        best = j;
                    }
                }
                best
            }
            Task::Ovo => {
                let mut votes = vec![0usize; k];
                let mut p = 0;
                for i in 0..k {
                    for j in i + 1..k {
                        if r[p] > 0.0 {
                            votes[i] += 1;
                        } else {
                            votes[j] += 1;
                        }
                        p += 1;
                    }
                }
                let mut best = 0;
                for c in 1..k {
                    if votes[c] > votes[best] {
                        best = c;
                    }
                }
                best
            }
        })
        .collect()
}

/// A task, its class labels and its number of decision values, checked together.
#[derive(Debug, Clone, PartialEq)]
pub struct OutputRule {
    task: Task,
    labels: Vec<String>,
    outputs: usize,
}

impl OutputRule {
    /// Checks that `labels` fit `task` (at least two distinct labels for a classifier,
    /// exactly two for a binary one, none for regression) and that `outputs` decision values
    /// are what the task needs.
    pub fn new(task: Task, labels: Vec<String>, outputs: usize) -> Result<OutputRule> {
        if outputs == 0 {
            return Err(Error::input("a model needs at least one decision value"));
        }
        match task.outputs_for(labels.len()) {
            Some(want) => {
                if labels.len() < 2 {
                    return Err(Error::input(format!(
                        "a {} model needs at least 2 class labels, got {}",
                        task.name(),
                        labels.len()
                    )));
                }
                if task == Task::Binary && labels.len() != 2 {
                    return Err(Error::input(format!(
                        "a binary model needs exactly 2 labels, got {}",
                        labels.len()
                    )));
                }
                if want != outputs {
                    return Err(Error::input(format!(
                        "a {} model with {} labels needs {want} decision values, the model has {outputs}",
                        task.name(),
                        labels.len()
                    )));
                }
                let mut seen = std::collections::HashSet::new();
                if let Some(dup) = labels.iter().find(|l| !seen.insert(l.as_str())) {
                    return Err(Error::input(format!("class label '{dup}' appears twice")));
                }
            }
            None if !labels.is_empty() => {
                return Err(Error::input("a regression model takes no class labels"))
            }
            None => {}
        }
        Ok(OutputRule {
            task,
            labels,
            outputs,
        })
    }

    /// The task.
    pub fn task(&self) -> Task {
        self.task
    }
    /// Class labels (empty for regression).
    pub fn labels(&self) -> &[String] {
        &self.labels
    }
    /// Decision values per row.
    pub fn outputs(&self) -> usize {
        self.outputs
    }

    /// Names of the decision values, saying which class a positive value favours, with
    /// one rule for every task: in `decision_A_vs_B` a positive value favours `A` (binary:
    /// `A` is the second label; one-vs-one: the first class of the pair); `decision_A`
    /// (one-vs-rest) is `A`'s score; regression outputs are `decision` or `decision_0…`.
    /// Labels are kept as they are (a CSV writer quotes them, RFC 4180).
    ///
    /// ```
    /// use kernelpress::model::{OutputRule, Task};
    /// let r = OutputRule::new(Task::Binary, vec!["ok".into(), "worn".into()], 1).unwrap();
    /// assert_eq!(r.decision_names(), vec!["decision_worn_vs_ok"]);
    /// ```
    pub fn decision_names(&self) -> Vec<String> {
        let l = &self.labels;
        match self.task {
            Task::Regression if self.outputs == 1 => vec!["decision".into()],
            Task::Regression => (0..self.outputs).map(|j| format!("decision_{j}")).collect(),
            Task::Binary => vec![format!("decision_{}_vs_{}", l[1], l[0])],
            Task::Ovr => l.iter().map(|a| format!("decision_{a}")).collect(),
            Task::Ovo => {
                let mut v = Vec::new();
                for i in 0..l.len() {
                    for j in i + 1..l.len() {
                        v.push(format!("decision_{}_vs_{}", l[i], l[j]));
                    }
                }
                v
            }
        }
    }

    /// Names of the per-class columns `score` writes by default (classifiers): `margin`,
    /// then one column per class in label order — `wins_<label>` for one-vs-one models
    /// (pairwise contests won, 0 to classes − 1), `score_<label>` for binary and
    /// one-vs-rest models (a larger score wins). Empty for regression. Labels are kept as
    /// they are (a CSV writer quotes them, RFC 4180).
    ///
    /// ```
    /// use kernelpress::model::{OutputRule, Task};
    /// let r = OutputRule::new(Task::Binary, vec!["ok".into(), "worn".into()], 1).unwrap();
    /// assert_eq!(r.class_column_names(), vec!["margin", "score_ok", "score_worn"]);
    /// ```
    pub fn class_column_names(&self) -> Vec<String> {
        if !self.task.is_classifier() {
            return Vec::new();
        }
        let prefix = if self.task == Task::Ovo {
            "wins_"
        } else {
            "score_"
        };
        let mut v = vec!["margin".to_string()];
        v.extend(self.labels.iter().map(|l| format!("{prefix}{l}")));
        v
    }

    /// The values of [`Self::class_column_names`] for one row of decision values: the
    /// margin, then one value per class.
    ///
    /// - binary (decision `s`, positive favours the second label): scores `−s/2`, `s/2`
    ///   (so that the difference of the two is the decision), margin `|s|`;
    /// - one-vs-rest: each class's own score; margin: the winner's score minus the
    ///   runner-up's;
    /// - one-vs-one: pairwise contests won by each class; margin: the closest of the
    ///   winner's own contests, signed so that a positive value favours the winner (how far
    ///   a decision of the winner would have to move to lose it; negative when the winner
    ///   lost a contest but still had the most wins).
    ///
    /// The margin is in decision units: 0 means a decision on the boundary.
    ///
    /// # Panics
    /// If the row does not have [`Self::outputs`] values (classifiers).
    #[track_caller]
    pub fn class_row(&self, r: ndarray::ArrayView1<f64>) -> Vec<f64> {
        if !self.task.is_classifier() {
            return Vec::new();
        }
        assert_eq!(r.len(), self.outputs, "one decision value per output");
        let k = self.labels.len();
        match self.task {
            Task::Binary => vec![r[0].abs(), -0.5 * r[0], 0.5 * r[0]],
            Task::Ovr => {
                let mut order: Vec<usize> = (0..k).collect();
                order.sort_by(|&a, &b| r[b].total_cmp(&r[a]).then(a.cmp(&b)));
                let mut v = vec![r[order[0]] - r[order[1]]];
                v.extend(r.iter().copied());
                v
            }
            Task::Ovo => {
                let win = label_indices(Task::Ovo, k, r.insert_axis(ndarray::Axis(0)))[0];
                let mut wins = vec![0.0; k];
                let mut margin = f64::INFINITY;
                let mut p = 0;
                for i in 0..k {
                    for j in i + 1..k {
                        if r[p] > 0.0 {
                            wins[i] += 1.0;
                        } else {
                            wins[j] += 1.0;
                        }
                        if i == win {
                            margin = margin.min(r[p]);
                        } else if j == win {
                            margin = margin.min(-r[p]);
                        }
                        p += 1;
                    }
                }
                let mut v = vec![margin];
                v.extend(wins);
                v
            }
            Task::Regression => unreachable!("classifiers only"),
        }
    }

    /// Label indices of decision values (0 for regression).
    pub fn indices(&self, s: ArrayView2<f64>) -> Vec<usize> {
        label_indices(self.task, self.labels.len(), s)
    }

    /// Labels of decision values (empty strings for regression).
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        if !self.task.is_classifier() {
            return vec![String::new(); s.nrows()];
        }
        self.indices(s)
            .into_iter()
            .map(|i| self.labels[i].clone())
            .collect()
    }
}
