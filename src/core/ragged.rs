pub fn _placeholder() {}
