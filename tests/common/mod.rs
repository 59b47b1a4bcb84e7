pub mod cases;
pub mod oracle;
