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
                    "task '{other}' is unknown; expected regression, binary, ovr or ovo"
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
    /// Commas and quotes in labels become `_` so that the names stay CSV fields.
    ///
    /// ```
    /// use kernelpress::model::{OutputRule, Task};
    /// let r = OutputRule::new(Task::Binary, vec!["ok".into(), "worn".into()], 1).unwrap();
    /// assert_eq!(r.decision_names(), vec!["decision_worn_vs_ok"]);
    /// ```
    pub fn decision_names(&self) -> Vec<String> {
        let clean = |s: &str| s.replace([',', '"', '\n', '\r'], "_");
        let l: Vec<String> = self.labels.iter().map(|s| clean(s)).collect();
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
