//! TEMPORARY stand-in until the rules branch lands (not committed).
#![allow(missing_docs, dead_code)]
use super::*;
#[derive(Debug, Clone)]
pub struct Rule {
    src: String,
    slots: Vec<Slot>,
}
#[derive(Debug, Clone)]
pub struct RuleState;
pub struct Compiled {
    pub rule: Rule,
    pub warnings: Vec<RuleDiagnostic>,
}
pub fn compile(text: &str, _scope: &dyn Scope) -> Result<Compiled, Vec<RuleDiagnostic>> {
    Ok(Compiled {
        rule: Rule {
            src: text.to_owned(),
            slots: vec![],
        },
        warnings: vec![],
    })
}
impl Rule {
    pub fn source(&self) -> &str {
        &self.src
    }
    pub fn new_state(&self) -> RuleState {
        RuleState
    }
    pub fn eval(&self, _input: &EvalInput<'_>, _state: &mut RuleState) -> Truth {
        Truth::Unknown
    }
    pub fn slots(&self) -> &[Slot] {
        &self.slots
    }
    pub fn describe(&self) -> String {
        self.src.clone()
    }
    pub fn explain(&self, _input: &EvalInput<'_>, _state: &RuleState) -> String {
        self.src.clone()
    }
    pub fn horizon(&self) -> std::time::Duration {
        std::time::Duration::ZERO
    }
}
pub fn implies(_a: &Rule, _b: &Rule) -> Option<bool> {
    None
}
pub fn satisfiable(_a: &Rule) -> Option<bool> {
    None
}
pub fn to_diagnostic(d: &RuleDiagnostic, offset: usize) -> crate::diag::Diagnostic {
    crate::diag::Diagnostic::error(d.code, d.message.clone(), d.span.start + offset..d.span.end + offset)
}
